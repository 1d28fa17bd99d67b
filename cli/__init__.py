"""counterbid command line."""
