"""Locate: PATH arguments -> the concrete input files, and the bad-file policy.

In: the PATH arguments as given (files, directories, globs, ``-`` for a list on stdin). Out: the
list of files in the order given (:func:`locate`), their size and mtime for the provenance
(:func:`file_stat`), and what to do with a file that cannot be used: stop with its one error line,
or skip it with a note (``--on-bad-file skip``, :func:`skip_or_raise`). A new kind of input
source (e.g. URLs) is added here and in circtrack/inputs/files.py.
"""

from __future__ import annotations

import os
import re
import sys

from circtrack.inputs.files import expand


def locate(paths, stdin=None):
    """The input files named by ``paths`` (see :func:`circtrack.inputs.files.expand`)."""
    return expand(paths, stdin=stdin)


def file_stat(path):
    """Absolute path, size and mtime of an input for the provenance (None for directories/stores)."""
    st = os.stat(path) if os.path.isfile(path) else None
    return {"path": os.path.abspath(path), "size": st.st_size if st else None,
            "mtime": int(st.st_mtime) if st else None}


def without_skip_hint(err):
    """The message of a skipped file, without the advice to skip it."""
    return re.sub(r",?\s*or pass --on-bad-file skip", "", str(err))


def skip_or_raise(err, path, policy, skipped):
    """``policy`` "skip": note the file in ``skipped`` and say so on stderr; otherwise raise ``err``."""
    if policy != "skip":
        raise err
    skipped.append({"path": path, "reason": str(err)})
    print(f"circtrack: skipped {without_skip_hint(err)}", file=sys.stderr, flush=True)
