"""contenders: put several Bayesian candidate models through the same trials on one dataset."""

__version__ = "0.1.0"


def run(config):
    """Run a comparison; see :func:`contenders.pipeline.runner.run`."""
    from contenders.pipeline.runner import run as _run

    return _run(config)
