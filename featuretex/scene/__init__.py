"""Scene input: manifest, cameras, mesh, photos."""
