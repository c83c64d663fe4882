"""Declarative flow definitions shipped with thresher (data only)."""
