"""The web layer: app factory (``app``), REST routes (``api``), pages, plots, auth, the analysis pool."""
