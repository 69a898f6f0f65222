"""cubecast viewer: depends only on the wire format."""
