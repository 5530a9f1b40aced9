"""contenders: put several Bayesian candidate models through the same trials on one dataset."""

__version__ = "0.1.0"
