"""Input and output at the edges: measurement files, time tags."""
