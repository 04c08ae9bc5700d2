"""lampyr.webui  (DEVELOPERS.md has the map)."""
