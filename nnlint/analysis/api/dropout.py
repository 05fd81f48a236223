"""Framework knowledge for the dropout rules (canonical names -> roles)."""
