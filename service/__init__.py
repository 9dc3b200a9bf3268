"""dipshape.service: the faces of dipshape (CLI, REST, client, batch)."""
