"""The tile pipeline of demaudit."""
