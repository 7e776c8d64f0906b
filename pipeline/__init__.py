"""edgeproof: nightly discovery of which operational signals are directly linked.

The public surface is re-exported here; see `pipeline.api` for running and loading runs.
"""

__version__ = "0.1.0"

__all__ = ["__version__", "run_pipeline", "load_run", "load_config", "RunResult"]


def __getattr__(name: str):  # lazy, so `python -m pipeline --help` stays quick
    if name in {"run_pipeline", "load_run", "RunResult"}:
        from . import api

        return getattr(api, name)
    if name == "load_config":
        from .config import load_config

        return load_config
    raise AttributeError(name)
