"""The nightly job: a job file chaining the stages, skipping those whose inputs are unchanged."""
from .job import run_job

__all__ = ["run_job"]
