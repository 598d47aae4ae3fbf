"""corral's runtime: design, laws, the loop, the watchdog, logs, dashboard and CLI."""

__version__ = "0.1.0"
