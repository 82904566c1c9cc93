"""Content digests (SHA-256) of input files, remembered across runs.

A visit's identity is the content of its raw and reference files, so every
run needs their digests.  Hashing a visit of many gigabytes each time would
dominate an identical re-run, so the digest of a file is remembered together
with the file's path, size, modification time, change time and inode, and
reused only while **all** of them are unchanged (any change, a ``touch``
included, makes the file be hashed again; a copy is a new inode, so it is
hashed again too).  The record lives in a small JSON file, by default
``NOTEBOOK/.digests.json``, written atomically (temporary file and
:func:`os.replace`) and merged under an advisory lock, so that reducers
running at once on one visit never corrupt it; losing a record only costs a
second hashing.
"""

import fcntl
import hashlib
import json
import os
import tempfile
from pathlib import Path

__all__ = ["sha256_of", "DigestCache", "CACHE_NAME", "current_umask"]

#: Name of the digest record inside a notebook folder.
CACHE_NAME = ".digests.json"

_VERSION = 1


def sha256_of(path, block=1 << 20):
    """Hex SHA-256 of a file's bytes."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(block), b""):
            digest.update(chunk)
    return digest.hexdigest()


def _key(st):
    return [st.st_size, st.st_mtime_ns, st.st_ctime_ns, st.st_ino]


class DigestCache:
    """Digests of files, reused while a file's stat record is unchanged.

    Parameters
    ----------
    record : str or Path, optional
        JSON file that keeps the digests across runs; None keeps them in
        memory only.

    Notes
    -----
    :meth:`digest` stats the file once and hashes it only when no record
    matches; :meth:`save` writes the new records back (merging with what
    another process may have written meanwhile).
    """

    def __init__(self, record=None):
        self.record = Path(record) if record is not None else None
        self.entries = self._load()
        self.new = {}
        self.hashed = 0      # files hashed (not found in the record)
        self.stats = 0       # files stat-ed

    def _load(self):
        if self.record is None:
            return {}
        try:
            doc = json.loads(self.record.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            return {}
        if not isinstance(doc, dict) or doc.get("version") != _VERSION \
                or not isinstance(doc.get("files"), dict):
            return {}
        return doc["files"]

    def digest(self, path):
        """SHA-256 (hex) of ``path``, hashed only when its stat record changed."""
        path = os.path.abspath(path)
        st = os.stat(path)
        self.stats += 1
        key = _key(st)
        known = self.new.get(path) or self.entries.get(path)
        if isinstance(known, list) and len(known) == 2 and known[0] == key:
            return known[1]
        value = sha256_of(path)
        self.hashed += 1
        # a file modified while it was hashed is not remembered
        if _key(os.stat(path)) == key:
            self.new[path] = [key, value]
        return value

    def save(self):
        """Merge the new records into the record file, atomically; never raises."""
        if self.record is None or not self.new:
            return
        try:
            self.record.parent.mkdir(parents=True, exist_ok=True)
            lock = os.open(str(self.record) + ".lock", os.O_RDWR | os.O_CREAT, 0o666)
            try:
                fcntl.flock(lock, fcntl.LOCK_EX)
                files = self._load()
                files.update(self.new)
                # forget files that no longer exist (a removed or renamed visit)
                files = {p: v for p, v in files.items() if p in self.new or os.path.exists(p)}
                fd, tmp = tempfile.mkstemp(prefix=".digests-", suffix=".part",
                                           dir=self.record.parent)
                try:
                    with os.fdopen(fd, "w", encoding="utf-8") as fh:
                        json.dump({"version": _VERSION, "files": files}, fh)
                    os.chmod(tmp, 0o666 & ~_umask())
                    os.replace(tmp, self.record)
                except BaseException:
                    if os.path.exists(tmp):
                        os.unlink(tmp)
                    raise
            finally:
                os.close(lock)
            self.entries = files
            self.new = {}
        except OSError:
            pass      # a read-only notebook: digests are simply computed again next time


def current_umask():
    """The process's file-creation mask (read without changing it where the system allows)."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


_umask = current_umask
