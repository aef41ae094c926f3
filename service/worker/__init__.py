"""Tuning workers: the process loop (``process``), leading a job (``lead``), joining one
(``join``), the job heartbeat (``heartbeat``), the ranked trial copy (``trials``) and
finishing a job with its model (``finalise``)."""

from service.worker.process import Worker, main

__all__ = ["Worker", "main"]
