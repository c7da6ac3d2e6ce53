"""Background fits: the job runner (worker processes, progress, cancel) over the job records in the store."""

from service.jobs.runner import JobRunner

__all__ = ["JobRunner"]
