"""The REST front end: FastAPI app (OGC API - Processes), routes, problems, security, pages."""
