"""The synthetic demo study: SBEM-like volumes with known truth, for exercising the workflow.

The demo study is invented: a lab compares brown adipose tissue of animals kept at
thermoneutrality with animals kept in the cold, three animals per condition, one dataset per
animal. Every dataset is rendered from a seed, so the whole study is reproducible byte for byte,
and every dataset carries its true labels, its true defects and a built-in effect on
mitochondrial volume (see ``demo/README.md``).

This is data generation, not analysis: it may import the ``tessera`` library, and the library
never imports it. The study's settings (seed, shape, effect, animal spread, tile size) are the
``demo:`` section of ``config/config.yaml``; its datasets are the rows of the demo sheet.

Modules: ``study`` (seeds, the built-in effect), ``geometry`` and ``mitochondria`` (the
organelles), ``defects`` (injected section defects), ``render`` (the EM-like image),
``tiles`` (where the annotation tiles lie), ``files`` (writing a dataset), ``checks``.
"""
