"""Framework knowledge for the init rules (canonical names -> roles)."""
