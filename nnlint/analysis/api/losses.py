"""Framework knowledge for the losses rules (canonical names -> roles)."""
