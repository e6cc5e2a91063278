"""The streaming pipeline, as a short chain of stages (one module each):

    locate.py    PATH arguments -> input files; the bad-file policy
    prepare.py   one file -> its detected coordinates and variables and a reader per role
    plan.py      -> the run's plain record: metrics -> roles, joined inputs, time axis and repeats,
                    provisional streams, members, tasks and batches (reads no data)
    reduce.py    worker side: one task -> zonal statistics and reducer extras (open-file cache)
    pool.py      where tasks run: forked processes, threads, this process, a dask cluster
    gather.py    tasks -> reduced batches in chronological order; repeats compared
    features.py  reduced batch -> every family's results per sector, as columns
    rows.py      columns -> the tidy Outcome and its provenance; members merged
    run.py       the stages tied together (track, Run)
    sectors.py, times.py, progress.py: longitude bands, ISO times, the progress bar

Only the variables and levels the chosen metrics need are read; memory is bounded by the batch,
never by the record length. DEVELOPERS.md describes how data flows through the stages.
"""

from circtrack.engine.features import Detector
from circtrack.engine.gather import BatchReader, group_chunks
from circtrack.engine.locate import file_stat, locate
from circtrack.engine.plan import MEMBER_ATTRIBUTES, Plan, RunPlan, choose_time_steps, member_groups
from circtrack.engine.pool import Runner
from circtrack.engine.prepare import FileInfo, MissingRoles, available_metrics, prepare_file
from circtrack.engine.progress import Progress
from circtrack.engine.reduce import close_cached, reduce_chunk, reduce_chunks
from circtrack.engine.rows import Outcome, derive_source, merge_members
from circtrack.engine.run import Run, track
from circtrack.engine.sectors import merge_sectors, parse_sector, sector_mask, sector_masks
from circtrack.engine.times import iso_time, time_step_days

__all__ = ["BatchReader", "Detector", "FileInfo", "MEMBER_ATTRIBUTES", "MissingRoles", "Outcome", "Plan",
           "Progress", "Run", "RunPlan", "Runner", "available_metrics", "choose_time_steps", "close_cached",
           "derive_source", "file_stat", "group_chunks", "iso_time", "locate", "member_groups", "merge_members",
           "merge_sectors", "parse_sector", "prepare_file", "reduce_chunk", "reduce_chunks", "sector_mask",
           "sector_masks", "time_step_days", "track"]
