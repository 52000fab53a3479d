"""One router per resource: the landing page and conformance, processes, jobs, health."""

from __future__ import annotations

from service.routes import health, jobs, landing, processes

__all__ = ["health", "jobs", "landing", "processes"]
