"""World."""
