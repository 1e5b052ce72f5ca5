"""shoal.daemon: everything that touches the world — files, state, clock, HTTP, the CLI."""
