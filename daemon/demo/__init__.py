"""``shoal demo``: the cold-storage warehouse scenario (invented data), end to end."""
