"""The ``fleetsim`` command: a thin shell over the public API and the report and study
libraries (:mod:`.app` holds the command group, :mod:`.console` what the commands share)."""

from .app import app, main

__all__ = ["app", "main"]
