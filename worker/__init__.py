"""lampyr.worker (see DESIGN.md)."""
