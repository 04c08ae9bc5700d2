"""lampyr.worker  (DEVELOPERS.md has the map)."""
