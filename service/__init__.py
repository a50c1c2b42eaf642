"""keepset: decoding policies as a governed, observable service.

The package is laid out one module per concept; data flows one way:
request -> route -> policy -> sampler -> response + metrics.
"""

__version__ = "0.1.0"
