"""Plumbline: keeps recurring linear-regression forecasts honest.

The import package is ``monitor``; the distribution and the console command are ``plumbline``.
Layers (imports point downward only): ``cli`` → ``daemon`` → ``passes`` → ``notify`` →
``findings`` → ``ingest`` / ``store`` / ``config`` → ``stats`` → ``vocabulary`` and ``errors``.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
