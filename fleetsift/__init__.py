"""fleetsift: unsupervised screening of fleet sensor recordings on the SPD manifold."""

__version__ = "0.1.0"
