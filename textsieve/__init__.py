"""textsieve: export, version and serve convolutional text classifiers."""

__version__ = "0.1.0"

__all__ = ["__version__"]
