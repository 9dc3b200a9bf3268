"""dipshape.training: simulation of labelled events, datasets, classifier fitting."""
