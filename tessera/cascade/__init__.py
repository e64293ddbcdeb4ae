"""The cascaded hierarchical model: image features, classifiers, stages and levels."""
