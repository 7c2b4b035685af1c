"""An fsspec filesystem over the local disk that fails on purpose, as real storage does.

``faulty://<local path>`` with the storage option ``plan=FaultPlan(...)``. Rules say which
operation on which paths fails how, and how many times; every injected fault is recorded so
tests can count them. Kinds:

* ``error`` — the operation raises ``OSError`` and does nothing;
* ``lands`` — a write is carried out and *then* raises (the client cannot tell it worked);
* ``short`` — a read returns only the first half of the bytes asked for;
* ``timeout`` — the operation raises ``TimeoutError`` and does nothing;
* ``denied`` — the operation raises ``PermissionError`` (as a client does on 403), and does nothing.

Extra storage options (``key=``, ``secret=``, ...) are accepted and kept, like a real client
would; ``chatty=True`` makes error messages quote them, as careless clients do, so tests can
prove that scanshelf scrubs them.
"""

from __future__ import annotations

import io
import re
import threading
from dataclasses import dataclass, field

import fsspec
from fsspec.implementations.local import LocalFileSystem
from fsspec.spec import AbstractFileSystem


@dataclass
class Rule:
    op: str  # read | write | list
    kind: str  # error | lands | short | timeout
    match: str = ""  # regular expression searched in the path
    times: int = 1  # how many matching calls fail; -1 = all


@dataclass
class FaultPlan:
    rules: list[Rule] = field(default_factory=list)
    injected: list[tuple[str, str, str]] = field(default_factory=list)  # (op, kind, path)
    touched: list[str] = field(default_factory=list)  # every path any call used
    _lock: threading.Lock = field(default_factory=threading.Lock, repr=False)

    def fault(self, op: str, path: str) -> str | None:
        with self._lock:
            self.touched.append(path)
            for rule in self.rules:
                if rule.op == op and rule.times != 0 and re.search(rule.match, path):
                    if rule.times > 0:
                        rule.times -= 1
                    self.injected.append((op, rule.kind, path))
                    return rule.kind
        return None


class FaultyFileSystem(AbstractFileSystem):
    protocol = "faulty"
    cachable = False
    root_marker = "/"

    def __init__(self, plan: FaultPlan | None = None, chatty: bool = False, **options):
        super().__init__()
        self.plan = plan or FaultPlan()
        self.chatty = chatty
        self.options = options  # credentials a real client would hold
        self.local = LocalFileSystem()

    @classmethod
    def _strip_protocol(cls, path):
        path = path[len("faulty://"):] if path.startswith("faulty://") else path
        return LocalFileSystem._strip_protocol(path)

    def _fail(self, kind: str, op: str, path: str) -> None:
        said = f" (client options {self.options})" if self.chatty else ""
        if kind == "timeout":
            raise TimeoutError(f"{op} of {path} timed out{said}")
        if kind == "denied":
            raise PermissionError(13, f"Access Denied ({op}){said}", path)
        raise OSError(f"injected {op} failure on {path}{said}")

    # listing -----------------------------------------------------------------------------------
    def ls(self, path, detail=True, **kwargs):
        path = self._strip_protocol(path)
        kind = self.plan.fault("list", path)
        if kind:
            self._fail(kind, "list", path)
        return self.local.ls(path, detail=detail, **kwargs)

    def info(self, path, **kwargs):
        path = self._strip_protocol(path)
        kind = self.plan.fault("list", path)
        if kind:
            self._fail(kind, "info", path)
        return self.local.info(path, **kwargs)

    def makedirs(self, path, exist_ok=False):
        return self.local.makedirs(self._strip_protocol(path), exist_ok=exist_ok)

    def mkdir(self, path, create_parents=True, **kwargs):
        return self.local.mkdir(self._strip_protocol(path), create_parents=create_parents, **kwargs)

    def rm_file(self, path):
        return self.local.rm_file(self._strip_protocol(path))

    def _rm(self, path):
        return self.local._rm(self._strip_protocol(path))

    def mv(self, path1, path2, **kwargs):
        p1, p2 = self._strip_protocol(path1), self._strip_protocol(path2)
        kind = self.plan.fault("write", p2)
        if kind in ("error", "timeout"):
            self._fail(kind, "rename", p2)
        self.local.mv(p1, p2, **kwargs)
        if kind == "lands":
            self._fail("error", "rename", p2)

    # reading -----------------------------------------------------------------------------------
    def cat_file(self, path, start=None, end=None, **kwargs):
        path = self._strip_protocol(path)
        kind = self.plan.fault("read", path)
        if kind in ("error", "timeout", "lands"):
            self._fail("timeout" if kind == "timeout" else "error", "read", path)
        data = self.local.cat_file(path, start=start, end=end)
        return data[: len(data) // 2] if kind == "short" else data

    # writing -----------------------------------------------------------------------------------
    def pipe_file(self, path, value, mode="overwrite", **kwargs):
        path = self._strip_protocol(path)
        kind = self.plan.fault("write", path)
        if kind in ("error", "timeout", "denied"):
            self._fail(kind, "write", path)
        if kind == "short":
            value = value[: len(value) // 2]  # a write that silently loses its tail
        self.local.makedirs(self.local._parent(path), exist_ok=True)
        self.local.pipe_file(path, value)
        if kind == "lands":
            self._fail("error", "write", path)

    def put_file(self, lpath, rpath, callback=None, **kwargs):
        with open(lpath, "rb") as f:
            self.pipe_file(rpath, f.read())

    def _open(self, path, mode="rb", block_size=None, autocommit=True, cache_options=None, **kwargs):
        path = self._strip_protocol(path)
        if "r" in mode:
            return io.BytesIO(self.cat_file(path))
        return _Upload(self, path)


class _Upload(io.BytesIO):
    """A write handle that uploads in one piece on close (as object stores do)."""

    def __init__(self, fs: FaultyFileSystem, path: str):
        super().__init__()
        self._fs, self._path = fs, path

    def close(self) -> None:
        if not self.closed:
            data = self.getvalue()
            super().close()
            self._fs.pipe_file(self._path, data)


fsspec.register_implementation("faulty", FaultyFileSystem, clobber=True)
