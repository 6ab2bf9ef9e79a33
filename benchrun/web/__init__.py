"""The web application of ``benchrun serve``: lots, a lot's devices and waveforms, part
history, checking reports and live runs, read-only over the results store.

``create_app(WebConfig(results=...))`` builds the Flask application (:mod:`benchrun.web.app`).
"""

from benchrun.web.app import WebConfig, create_app

__all__ = ["WebConfig", "create_app"]
