"""dvgate: gateware that emulates pulse-output accelerometers, proven against a model.

The package imports no Amaranth at the top level, so the reference model and the
configuration stay usable without it.
"""

__version__ = "0.1.0"
