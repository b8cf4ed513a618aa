"""apportion's pipelines: stages, engines, config, store and the Dagster definitions (DEVELOPERS.md, *Layout*)."""

from pipelines.allocator import keep_freed_memory

keep_freed_memory()  # process-wide, once: freed arrays' memory reused, not faulted in again (pipelines/allocator.py)
