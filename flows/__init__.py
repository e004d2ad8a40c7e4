"""fitaudit.flows."""
