r"""Output files replaced whole or not at all.

Every file fieldprop writes for the user (result and check JSON, XYZ
structures, the ranked CSV, pictures) goes through :func:`replacing`: a
temporary file of its own in the target's folder (a unique name, so two
writers of one path never share one), flushed to disk, then renamed over the
target in one step (``os.replace``, atomic within a folder). A reader sees the
old document or the new one, never a part; of two concurrent writers the last
rename wins, each document complete. Anything that ends the write before the
rename, Ctrl-C and SIGTERM's exit included, removes the temporary file and
leaves the old one as it was.

>>> import tempfile, pathlib
>>> folder = pathlib.Path(tempfile.mkdtemp())
>>> with replacing(folder / "note.txt") as fh:
...     _ = fh.write("whole\n")
>>> (folder / "note.txt").read_text(), [p.name for p in folder.iterdir()]
('whole\n', ['note.txt'])
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from pathlib import Path
from typing import IO, Iterator


@contextlib.contextmanager
def replacing(path: Path, binary: bool = False, newline: str | None = None) -> Iterator[IO]:
    """A file object whose contents replace ``path`` when the block ends
    without an exception (text in UTF-8, or ``binary``; ``newline`` as for
    :func:`open`). The temporary file is ``.<name>.<random>.tmp`` beside it.

    A symbolic link is followed (the file it names is replaced, the link
    kept); a target that is not a regular file (``/dev/null``, a named pipe,
    a terminal) is written directly, since renaming over it would replace the
    device or pipe with an ordinary file."""
    path = Path(os.path.realpath(path))
    if path.exists() and not path.is_file():
        with (open(path, "wb") if binary else
              open(path, "w", encoding="utf-8", newline=newline)) as fh:
            yield fh
        return
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(dir=folder, prefix=f".{path.name}.", suffix=".tmp")
    try:
        with (os.fdopen(fd, "wb") if binary else
              os.fdopen(fd, "w", encoding="utf-8", newline=newline)) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())  # the data on disk before the name points at it
        # mkstemp makes the file private (0600); give it the usual permissions.
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    _sync_folder(folder)


def _sync_folder(folder: Path) -> None:
    """Flush the folder's entry of the renamed file (the rename itself is then
    durable); not every file system lets a folder be opened or synced."""
    with contextlib.suppress(OSError):
        fd = os.open(folder, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)
