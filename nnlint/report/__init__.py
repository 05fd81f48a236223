"""Output formats: text (flake8's line format), json (DESIGN §5), sarif."""
