"""``python -m snaplift.workflow.bench.started CMD ...``: print the wall-clock start, then become CMD.

The bench's whole-command timings count from here; a run's startup share (imports, scan,
fingerprint sampling) is the time from this mark to the end of its scan stage.
"""

from __future__ import annotations

import os
import sys
import time

from snaplift.workflow.bench.commands import START_MARK


def main(argv: list[str]) -> None:
    print(f"{START_MARK} {time.time():.6f}", flush=True)
    os.execvp(argv[0], argv)


if __name__ == "__main__":
    main(sys.argv[1:])
