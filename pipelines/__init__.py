"""apportion's pipelines: stages, engines, config, store and the Dagster definitions (DEVELOPERS.md, *Layout*)."""

from pipelines.allocator import keep_freed_memory, small_array_pages

keep_freed_memory()  # process-wide, once: freed arrays' memory reused, not faulted in again (pipelines/allocator.py)
small_array_pages()  # numpy's huge-page advice off: no compaction stalls on a growing heap (the same module)
