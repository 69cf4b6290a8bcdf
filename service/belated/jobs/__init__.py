"""Scheduled jobs: the runner (APScheduler 3), the leader lock and the steps of a run."""

from belated.jobs.leader import Leader
from belated.jobs.runner import JobRunner
from belated.jobs.steps import STEPS, Step, StepContext, refresh_step

__all__ = ["STEPS", "JobRunner", "Leader", "Step", "StepContext", "refresh_step"]
