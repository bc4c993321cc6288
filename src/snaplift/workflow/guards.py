"""Guards of a run's output: where it may be written, what a write error says, what text is kept.

- :func:`check_output_path` refuses an output (or its staging area, old store or lease)
  inside an archive folder, an archive glob that would match snaplift's own files, and
  paths that are no store path (``/``).
- :func:`write_error` turns the file system's refusals (disk full, file-size limit,
  read-only, permissions) into one line naming the path and the fix.
- :func:`capped_workflow_text` keeps the store's attributes small.
"""

from __future__ import annotations

import errno
import fnmatch
import hashlib
import os
from pathlib import Path

from snaplift.errors import ConfigError, ResultStoreError

__all__ = ["WRITE_ERRNOS", "WORKFLOW_TEXT_LIMIT", "capped_workflow_text", "check_output_path", "write_error"]

#: errors of the file system the result is written to, each with its fix
WRITE_ERRNOS = {
    errno.ENOSPC: "free some space or choose another output.path",
    errno.EDQUOT: "free some space within your quota or choose another output.path",
    errno.EFBIG: "raise the file-size limit (ulimit -f) or choose another output.path",
    errno.EROFS: "the file system is read-only: choose another output.path",
    errno.EACCES: "you may not write there: choose another output.path or fix its permissions",
    errno.EPERM: "you may not write there: choose another output.path or fix its permissions",
}


def write_error(error: OSError, output: Path) -> ResultStoreError:
    where = error.filename or output
    advice = WRITE_ERRNOS.get(error.errno or 0, "check that the output folder is writable")
    return ResultStoreError(
        f"cannot write {where}: {error.strerror or error}; {advice}; the previous result "
        f"store {output} (if any) is unchanged and finished stages are kept for the next run")


def check_output_path(output: Path, archive: str | list[str]) -> None:
    """Refuse an output (or its staging area, old store or lease) inside an archive, or an archive inside it."""
    output = Path(os.path.abspath(output))
    if output == Path(output.anchor) or output.name in ("", ".", ".."):
        raise ConfigError(f"output.path {str(output)!r} is not a store path; give a folder name such as "
                          "results/run.zarr")
    own = [output, output.with_name(output.name + ".staging"), output.with_name(output.name + ".old"),
           output.with_name(output.name + ".lease")]
    for item in archive if isinstance(archive, list) else [archive]:
        text = str(item)
        if any(ch in text for ch in "*?["):
            # a glob of per-snapshot files must never match snaplift's own files
            pattern = os.path.abspath(text)
            if any(fnmatch.fnmatch(str(p), pattern) or fnmatch.fnmatch(str(p / "zarr.json"), pattern)
                   or fnmatch.fnmatch(str(p / "c" / "0"), pattern) for p in own):
                raise ConfigError(f"the archive glob {text} would match snaplift's own output {output}; choose "
                                  "an output.path the glob does not match")
            continue
        root = Path(os.path.abspath(text))
        if root.is_dir() and any(p == root or root in p.parents for p in own):
            raise ConfigError(
                f"output.path {output} is inside the archive {text}: results would be written into the input "
                "(and read back as data); choose an output.path outside it")
        if root == output or output in root.parents:
            raise ConfigError(f"output.path {output} contains the archive {text}; choose another output.path")


#: longest workflow text kept in the store's attributes (the file itself is at most 1 MiB)
WORKFLOW_TEXT_LIMIT = 64 * 1024


def capped_workflow_text(text: str) -> str:
    if len(text) <= WORKFLOW_TEXT_LIMIT:
        return text
    digest = hashlib.sha256(text.encode()).hexdigest()
    return (text[:WORKFLOW_TEXT_LIMIT] + f"\n# ... cut: {len(text) - WORKFLOW_TEXT_LIMIT} more characters; "
            f"sha256 of the whole text {digest}\n")
