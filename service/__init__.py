"""quaver's service: sources, pipeline, alarms, storage, API and CLI around the dsp engine.

Owns every kind of I/O; the numerical work lives in the ``dsp`` package."""

__version__ = "0.1.0"
