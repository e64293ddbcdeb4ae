"""pyplot on the Agg canvas: jobs draw PNG files, never to a screen."""


def pyplot():
    """matplotlib.pyplot with the non-interactive Agg backend selected."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt
