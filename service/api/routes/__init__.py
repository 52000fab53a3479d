"""One router per resource: landing page and conformance, processes, jobs, health."""
