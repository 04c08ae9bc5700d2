"""lampyr.scheduler (see DESIGN.md)."""
