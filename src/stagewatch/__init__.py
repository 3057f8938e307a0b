"""stagewatch: decide what to watch in a multi-stage ML pipeline, and prove the alerts work."""

__version__ = "0.1.0"
