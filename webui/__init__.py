"""lampyr.webui (see DESIGN.md)."""
