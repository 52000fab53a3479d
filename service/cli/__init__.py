"""The ``demaudit`` command line."""
