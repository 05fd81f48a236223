"""Framework knowledge for the numerics rules (canonical names -> roles)."""
