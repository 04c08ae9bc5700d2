"""lampyr.scheduler  (DEVELOPERS.md has the map)."""
