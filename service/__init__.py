"""Grovekeeper's HTTP service: API, database tables, job queue and tuning workers."""
