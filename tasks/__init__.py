"""fitaudit.tasks."""
