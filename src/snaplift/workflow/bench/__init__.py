"""``snaplift bench``: how fast is a run next to reading the archive?

- :mod:`.floor_cases`: compress against the floor (one hand-written read forming two thin
  products) on a warm page cache or a cold one (``--cold``);
- :mod:`.regime`: whole commands (``dd``, ``snaplift run``, dask's ``svd_compressed``) with
  reads capped and the page cache bounded (``--read-limit``/``--cache-limit``), chunk layouts,
  stage shares of the run;
- :mod:`.model`: the cost model (read time, arithmetic per tile, bytes over the network)
  and its prediction checked against the measurement.
"""

from snaplift.workflow.bench.archive import spectrum, write_archive
from snaplift.workflow.bench.floor_cases import BenchSettings, render_benchmark, run_benchmark
from snaplift.workflow.bench.memory import ProcessTreeMemory

__all__ = ["BenchSettings", "run_benchmark", "write_archive", "render_benchmark", "ProcessTreeMemory", "spectrum"]
