"""Whole-dataset batch runs over a BIDS dataset, locally or on dask.distributed.

The batch ties the workflows together for a whole study, one module per concern:

* :mod:`.bids` -- BIDS names and metadata (entities, the inheritance principle, IntendedFor
  with BIDS URIs, B0FieldIdentifier / B0FieldSource);
* :mod:`.inventory`, :mod:`.discovery`, :mod:`.fieldmaps` -- what the dataset holds and
  which field map belongs to which run (gradient-echo kinds and reversed phase-encode EPI
  groups);
* :mod:`.options` -- processing options for the whole dataset (command line or config file);
* :mod:`.plan`, :mod:`.params` -- tasks, their typed parameters, dependencies and hashes (resume);
* :mod:`.runners`, :mod:`.tasks`, :mod:`.execution` -- running a task into a staging folder,
  moving its outputs to their derivative names, executing the plan in process, in a local
  process pool or on dask;
* :mod:`.derivatives`, :mod:`.group`, :mod:`.reports` -- derivative names and sidecars, the
  group summary, the per-subject report;
* :mod:`.lock` -- one batch per output folder, and the leftovers of killed runs;
* :mod:`.run` -- :func:`run_batch`, the entry point.

Research software, not a medical device: corrected images must be inspected before they
are used for any decision about a person.

Examples
--------
>>> from fieldfix.batch import discover, plan_tasks                    # doctest: +SKIP
>>> inventory = discover("/data/study", participant_labels=["01"])    # doctest: +SKIP
>>> [t.task_id for t in plan_tasks(inventory, "/data/study/derivatives/fieldfix")]  # doctest: +SKIP
"""

from __future__ import annotations

import logging

from .bids import BidsName, derivative_name, parse_bids_name
from .derivatives import write_dataset_description
from .discovery import discover
from .execution import BatchExecution, execute_plan
from .inventory import FieldMapAcquisition, Inventory, Run
from .options import BatchOptions, read_batch_config
from .plan import Task, TaskResult, plan_tasks, run_entries, task_hash
from .run import BatchLog, run_batch
from .runners import RUNNERS
from .tasks import ThreadLimit, YoungObjectsOnly, execute_task, marker_path

logging.getLogger(__name__).addHandler(logging.NullHandler())

#: The task runners by kind (the same dict as :data:`fieldfix.batch.runners.RUNNERS`).
_RUNNERS = RUNNERS

__all__ = [
    "run_batch", "discover", "plan_tasks", "run_entries", "task_hash", "execute_plan", "execute_task",
    "marker_path", "write_dataset_description", "BidsName", "parse_bids_name", "derivative_name",
    "FieldMapAcquisition", "Run", "Inventory", "Task", "TaskResult", "BatchOptions", "read_batch_config",
    "ThreadLimit", "YoungObjectsOnly", "BatchExecution", "BatchLog",
]
