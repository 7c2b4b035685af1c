"""Copy a shelf to object storage or a web root: verified, resumable, catalog root last.

Order is what keeps readers safe: data objects first, then Zarr metadata, then the STAC layer
and the items index, then ``manifest.parquet``, and ``catalog.json`` last, so a reader who
finds the root finds everything it points to. Files already at the destination with the same
size and SHA-256 (from the previous manifest, or by hashing the remote copy) are skipped, so an
interrupted publish resumes where it stopped. The ledger never leaves the machine.
Storage options may hold credentials: they are passed to fsspec only, never written or logged.

Storage fails now and then: every upload is retried with exponential back-off until it reads
back right, and a publish that still cannot place a file names exactly the files missing. A
local file that no longer matches the shelf's own catalog (bit rot since the migration) is
never uploaded, so a good remote copy is not replaced by a damaged one.
"""

from __future__ import annotations

import hashlib
import io
import json
import logging
import os
import posixpath
import time
from collections.abc import Callable, Iterable
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import fsspec
from fsspec.implementations.local import LocalFileSystem

from archive import layout
from archive.catalog.grids import store_fingerprint
from archive.catalog.store import ShelfFiles, multihash_sha256, resolve_href
from archive.crashpoints import crash_point
from archive.hrefs import redact
from archive.storage import filesystem

if TYPE_CHECKING:
    import pyarrow as pa

log = logging.getLogger(__name__)

CHUNK = 1 << 20
LOCAL_ONLY = (layout.LEDGER,)  # and its SQLite side files: the ledger stays local
PHASES = ("data", "zarr metadata", "catalog", "manifest", "root")
RETRIES = 4  # attempts per file (upload + read-back) before it is reported missing
BACKOFF = 0.5  # seconds before the second attempt; doubles each time
TEMP_SUFFIX = ".publishing"
CREDENTIAL_VARIABLES = (  # environment credentials a storage client may echo in an error
    "AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY", "AWS_SESSION_TOKEN", "AZURE_STORAGE_KEY",
    "AZURE_STORAGE_CONNECTION_STRING", "AZURE_STORAGE_SAS_TOKEN", "GOOGLE_APPLICATION_CREDENTIALS",
)


class PublishError(RuntimeError):
    """A publish step failed; the message names the file and never holds credentials.

    ``missing`` lists the shelf-relative files not at the destination (or not verified there);
    ``damaged`` the local files that no longer match the shelf's catalog.
    """

    def __init__(self, message: str, missing: Iterable[str] = (), damaged: Iterable[str] = (),
                 permanent: bool = False) -> None:
        super().__init__(message)
        self.missing = list(missing)
        self.damaged = list(damaged)
        self.permanent = permanent  # a retry cannot help: the destination or its credentials must change


@dataclass(frozen=True)
class ManifestEntry:
    path: str  # shelf-relative, forward slashes
    size: int
    sha256: str
    action: str  # "upload" or "skip"


@dataclass
class PublishReport:
    dest: str  # redacted
    dry_run: bool
    files: list[ManifestEntry] = field(default_factory=list)

    @property
    def uploaded(self) -> list[str]:
        return [f.path for f in self.files if f.action == "upload"]

    @property
    def skipped(self) -> list[str]:
        return [f.path for f in self.files if f.action == "skip"]

    @property
    def bytes_uploaded(self) -> int:
        return sum(f.size for f in self.files if f.action == "upload")

    def __str__(self) -> str:
        verb = "would upload" if self.dry_run else "uploaded"
        return (
            f"{self.dest}: {verb} {len(self.uploaded)} file(s), {self.bytes_uploaded:,} bytes; "
            f"{len(self.skipped)} unchanged"
        )


def phase_of(path: str) -> int:
    """Which publish phase a shelf file belongs to (see module docstring)."""
    name = posixpath.basename(path)
    if path == layout.CATALOG:
        return 4
    if path == layout.MANIFEST:
        return 3
    if ".zarr/" in path:
        return 1 if name == "zarr.json" else 0
    if path.startswith("scans/") or name == "collection.json" or path.endswith(".json"):
        return 2
    return 0


def _is_local_only(path: str) -> bool:
    return (
        any(path == p or path.startswith(p + "-") for p in LOCAL_ONLY)
        or path == layout.MANIFEST
        or any(part.startswith(".") for part in path.split("/"))  # temp names of atomic writes
    )


def _sha256(fs: fsspec.AbstractFileSystem, path: str) -> str:
    h = hashlib.sha256()
    with fs.open(path, "rb", block_size=CHUNK) as f:
        while chunk := f.read(CHUNK):
            h.update(chunk)
    return h.hexdigest()


def _scrub(text: str, options: dict) -> str:
    secrets = [*_strings(options), *(os.environ.get(v, "") for v in CREDENTIAL_VARIABLES)]
    for value in sorted(secrets, key=len, reverse=True):
        if len(value) >= 4:
            text = text.replace(value, "***")
    return text


def _retry(action: Callable[[], Any], retries: int, backoff: float) -> Any:
    """``action()``, tried again after ``backoff``, 2×, 4×, ... seconds while it raises a transient error."""
    for attempt in range(retries):
        try:
            return action()
        except Exception as e:
            if attempt == retries - 1 or permanent(e):
                raise
            time.sleep(backoff * 2**attempt)


_PERMANENT_CODES = {"AccessDenied", "InvalidAccessKeyId", "SignatureDoesNotMatch", "NoSuchBucket",
                    "AllAccessDisabled", "AccountProblem", "InvalidBucketName", "403", "404", "401"}


def permanent(e: BaseException) -> bool:
    """Errors a retry cannot cure: a file where a folder must be, no permission, bad credentials,
    a bucket that does not exist. Everything else (time-outs, 5xx, dropped connections) is transient."""
    if isinstance(e, (NotADirectoryError, IsADirectoryError, PermissionError, FileExistsError)):
        return True
    status = getattr(e, "status", None) or getattr(e, "code", None)
    if isinstance(status, int) and status in (401, 403, 404):
        return True
    response = getattr(e, "response", None)
    code = response.get("Error", {}).get("Code") if isinstance(response, dict) else None
    return str(code) in _PERMANENT_CODES


def _ancestors(path: str) -> list[str]:
    """``path`` and every folder above it, nearest first."""
    out = [path]
    while (parent := os.path.dirname(out[-1])) != out[-1]:
        out.append(parent)
    return out


def _strings(obj: Any) -> Iterable[str]:
    if isinstance(obj, str):
        yield obj
    elif isinstance(obj, dict):
        for v in obj.values():
            yield from _strings(v)
    elif isinstance(obj, (list, tuple)):
        for v in obj:
            yield from _strings(v)


def _remote_manifest(fs, root: str) -> dict[str, tuple[int, str]]:
    import pyarrow.parquet as pq  # the manifest only; `scanshelf --help` imports this module

    try:
        table = pq.read_table(io.BytesIO(fs.cat_file(f"{root}/{layout.MANIFEST}")))
    except Exception:  # noqa: BLE001 (absent or unreadable: hash the remote copies instead)
        return {}
    return {p: (s, h) for p, s, h in zip(*(table[c].to_pylist() for c in ("path", "size", "sha256")))}


def _remote_sizes(fs, root: str) -> dict[str, int]:
    try:
        found = fs.find(root, detail=True)
    except FileNotFoundError:
        return {}
    prefix = fs._strip_protocol(root).rstrip("/") + "/"
    out = {}
    for name, info in found.items():
        name = fs._strip_protocol(name)
        if name.startswith(prefix) and info.get("type", "file") == "file":
            out[name[len(prefix):]] = int(info.get("size") or 0)
    return out


def manifest_table(entries: list[ManifestEntry]) -> pa.Table:
    """Every published file: path, size in bytes, SHA-256 hex digest."""
    import pyarrow as pa

    return pa.table(
        {
            "path": pa.array([e.path for e in entries], pa.string()),
            "size": pa.array([e.size for e in entries], pa.int64()),
            "sha256": pa.array([e.sha256 for e in entries], pa.string()),
        }
    )


def publish(
    shelf: str,
    dest: str,
    storage_options: dict | None = None,
    *,
    source_options: dict | None = None,
    dry_run: bool = False,
    workers: int = 8,
    verify: bool = True,
    rehash: bool = False,
    progress: Callable[[int], Any] | None = None,
    retries: int = RETRIES,
    backoff: float = BACKOFF,
) -> PublishReport:
    """Copy ``shelf`` to ``dest`` (any fsspec URL) and return what was (or would be) uploaded.

    Files at ``dest`` whose size and checksum the previous manifest vouches for are skipped
    without reading them; ``rehash=True`` hashes every same-size remote copy instead (slower,
    catches changes made behind the manifest's back). ``progress`` is called with a byte
    count as files finish (the CLI feeds a tqdm bar). Each file gets ``retries`` attempts,
    ``backoff`` seconds apart at first and twice as long each time.
    Raises PublishError when a written file does not read back with its size and checksum;
    the root catalog is then not written, so readers never see the broken copy.
    """
    options = dict(storage_options or {})
    shown = redact(os.fspath(dest))
    try:
        src_fs, src_root = filesystem(os.fspath(shelf), source_options)
        dst_fs, dst_root = filesystem(os.fspath(dest), options)
    except Exception as e:  # noqa: BLE001 (any backend error, scrubbed)
        raise PublishError(f"{shown}: cannot open the destination: {_scrub(str(e), options)}") from None
    src_root, dst_root = src_root.rstrip("/"), dst_root.rstrip("/")
    if isinstance(dst_fs, LocalFileSystem):
        blocked = next((p for p in _ancestors(dst_root) if os.path.exists(p) and not os.path.isdir(p)), None)
        if blocked is not None:
            raise PublishError(f"{shown}: {blocked} is a file, not a folder; give a folder or a URL as the destination",
                               permanent=True)
    if type(src_fs) is type(dst_fs) and src_root == dst_root:
        raise PublishError(f"{shown}: the destination is the shelf itself; give another folder or bucket", permanent=True)
    if not src_fs.exists(f"{src_root}/{layout.CATALOG}"):
        raise PublishError(f"{shelf}: no {layout.CATALOG}; is this a shelf? run the migration first", permanent=True)

    prefix = src_fs._strip_protocol(src_root).rstrip("/") + "/"
    local = {
        name[len(prefix):]: int(info["size"])
        for name, info in src_fs.find(src_root, detail=True).items()
        if name.startswith(prefix) and info.get("type", "file") == "file"
    }
    paths = sorted(p for p in local if not _is_local_only(p))
    with ThreadPoolExecutor(max_workers=workers) as pool:
        digests = dict(zip(paths, pool.map(lambda p: _sha256(src_fs, f"{prefix}{p}"), paths)))

    try:
        remote_sizes = _retry(lambda: _remote_sizes(dst_fs, dst_root), retries, backoff)
        manifest = _remote_manifest(dst_fs, dst_root) if remote_sizes else {}
    except Exception as e:  # noqa: BLE001 (any backend error, scrubbed)
        raise PublishError(f"{shown}: cannot list the destination: {_scrub(str(e), options)}",
                           permanent=permanent(e)) from None

    def unchanged(path: str) -> bool:
        if remote_sizes.get(path) != local[path]:
            return False
        if not rehash and manifest.get(path) == (local[path], digests[path]):
            return True
        try:
            return _sha256(dst_fs, f"{dst_root}/{path}") == digests[path]
        except Exception:  # noqa: BLE001 (unreadable remote copy: upload it again)
            return False

    with ThreadPoolExecutor(max_workers=workers) as pool:
        same = dict(zip(paths, pool.map(unchanged, paths)))
    entries = [ManifestEntry(p, local[p], digests[p], "skip" if same[p] else "upload") for p in paths]
    report = PublishReport(shown, dry_run, entries)
    manifest_bytes = _manifest_bytes(entries)
    manifest_sha = hashlib.sha256(manifest_bytes).hexdigest()
    if dry_run:
        return report
    uploads = {e.path for e in entries if e.action == "upload"}
    damaged = _damaged(ShelfFiles(os.fspath(shelf), source_options), local, digests, uploads, manifest)
    if damaged:
        raise PublishError(
            f"{shelf}: {len(damaged)} local file(s) no longer match the shelf's own catalog (damaged since "
            f"the migration?); nothing was uploaded and {shown} is unchanged. Run `scanshelf verify {shelf}`, "
            f"then restore or re-migrate them (or, if they were changed on purpose, `scanshelf catalog {shelf}`):"
            "\n  " + "\n  ".join(damaged),
            damaged=damaged,
        )

    local_dst = isinstance(dst_fs, LocalFileSystem)
    if local_dst:  # temporary files of a publish that was killed
        for stale in [p for p in remote_sizes if posixpath.basename(p).startswith(".") and p.endswith(TEMP_SUFFIX)]:
            dst_fs.rm_file(f"{dst_root}/{stale}")

    def put(path: str) -> None:
        target = f"{dst_root}/{path}"
        src = f"{prefix}{path}"
        tmp = target
        if local_dst:  # object stores have no folders (and makedirs there creates buckets)
            dst_fs.makedirs(posixpath.dirname(target), exist_ok=True)
            tmp = f"{posixpath.dirname(target)}/.{posixpath.basename(target)}{TEMP_SUFFIX}"
        if isinstance(src_fs, LocalFileSystem):
            dst_fs.put_file(src, tmp)
        else:
            with src_fs.open(src, "rb") as r, dst_fs.open(tmp, "wb") as w:
                while chunk := r.read(CHUNK):
                    w.write(chunk)
        if tmp != target:
            crash_point("publish.temp")
            dst_fs.mv(tmp, target)

    def check(entry: ManifestEntry) -> str | None:
        target = f"{dst_root}/{entry.path}"
        try:
            size = int(dst_fs.info(target)["size"])
            if size != entry.size:
                return f"{entry.path}: {size} bytes at the destination, {entry.size} in the shelf"
            if verify and _sha256(dst_fs, target) != entry.sha256:
                return f"{entry.path}: checksum differs from the shelf's"
        except Exception as e:  # noqa: BLE001 (any backend error, scrubbed)
            return f"{entry.path}: cannot read back: {type(e).__name__}: {_scrub(str(e), options)}"
        return None

    stop: list[str] = []  # the first permanent error; every other upload then ends at once

    def send(entry: ManifestEntry) -> str | None:
        """Upload and read back until the copy verifies; the last problem if it never does."""
        problem = None
        for attempt in range(retries):
            if stop:
                return f"{entry.path}: not attempted"
            if attempt:
                time.sleep(backoff * 2 ** (attempt - 1))
            try:
                put(entry.path)
                if hasattr(dst_fs, "invalidate_cache"):
                    dst_fs.invalidate_cache(f"{dst_root}/{entry.path}")
                problem = check(entry)
            except Exception as e:  # noqa: BLE001 (any backend error, scrubbed)
                problem = f"{entry.path}: upload failed: {type(e).__name__}: {_scrub(str(e), options)}"
                if permanent(e):
                    stop.append(problem)
                    return problem
            if problem is None:
                crash_point("publish.file")
                if progress is not None:
                    progress(entry.size)
                return None
            log.warning("%s: attempt %d of %d: %s", shown, attempt + 1, retries, problem)
        return problem

    for phase in range(len(PHASES)):
        todo = [e for e in entries if e.action == "upload" and phase_of(e.path) == phase]
        if phase == 3:  # the manifest of this publish, just before the root
            try:
                _retry(lambda: _write_manifest(dst_fs, dst_root, manifest_bytes, local_dst, shown, options),
                       retries, backoff)
            except PublishError as e:
                raise PublishError(f"{e}; the root catalog was not written", missing=[layout.MANIFEST]) from None
            crash_point("publish.manifest")
            continue
        if not todo:
            continue
        with ThreadPoolExecutor(max_workers=workers) as pool:
            problems = [(e.path, p) for e, p in zip(todo, pool.map(send, todo)) if p]
        if stop:
            raise PublishError(
                f"{shown}: {stop[0]}\nA retry cannot cure this (no permission, bad credentials, a missing bucket, "
                "or a file where a folder must be): fix the destination or its credentials, then publish again. "
                "The root catalog was not written.",
                missing=sorted(path for path, _ in problems), permanent=True,
            )
        if problems:
            later = [e.path for e in entries if e.action == "upload" and phase_of(e.path) > phase]
            raise PublishError(
                f"{shown}: {len(problems)} file(s) did not verify after {retries} attempts each and are missing "
                f"there; the root catalog was not written (readers still see the previous copy) and {len(later)} "
                "file(s) of later phases wait. Run publish again to retry:\n  " + "\n  ".join(p for _, p in problems),
                missing=sorted(path for path, _ in problems),
            )
        crash_point("publish.phase")
        log.info("%s: %s phase: %d file(s) uploaded and verified", shown, PHASES[phase], len(todo))
    log.info("%s: published (manifest sha256 %s)", shown, manifest_sha[:12])
    return report


def _damaged(shelf: ShelfFiles, local: dict[str, int], digests: dict[str, str], uploads: set[str],
             remote: dict[str, tuple[int, str]]) -> list[str]:
    """Files to upload whose bytes no longer match the checksums the shelf's own catalog records.

    Plain assets carry ``file:checksum``; a Zarr store carries one fingerprint over all its
    objects, so for a store the objects changed since the last publish are named.
    """
    docs = [p for p in digests if p.endswith(".json") and (
        p.startswith("scans/items/") or p in (layout.SCANS_COLLECTION, layout.GRIDS_COLLECTION))]
    found: list[str] = []
    for doc_path in docs:
        try:
            doc = json.loads(shelf.read_bytes(doc_path))
            assets = list((doc.get("assets") or {}).values())
        except (ValueError, RecursionError, AttributeError):
            continue  # `scanshelf verify` reports unreadable documents
        for asset in assets:
            try:
                target = resolve_href(doc_path, str(asset.get("href", "")))
            except ValueError:
                continue
            if target in uploads and asset.get("file:checksum") not in (None, multihash_sha256(digests[target])):
                found.append(f"{target}: does not match its catalog checksum")
            members = [p for p in local if p.startswith(target + "/")]
            want = asset.get("scanshelf:store_checksum")
            if want and uploads & set(members) and store_fingerprint(shelf, target)[1] != want:
                changed = [p for p in members if remote.get(p, (None, None))[1] not in (None, digests.get(p))]
                found.append(f"{target}: does not match its catalog checksum"
                             + (f" (changed since the last publish: {', '.join(sorted(changed))})" if changed else ""))
    return sorted(found)


def _manifest_bytes(entries: list[ManifestEntry]) -> bytes:
    import pyarrow.parquet as pq

    buf = io.BytesIO()
    pq.write_table(manifest_table(entries), buf, compression="zstd", write_page_checksum=True, store_schema=False)
    return buf.getvalue()


def _write_manifest(fs, root: str, data: bytes, local_dst: bool, shown: str, options: dict) -> None:
    target = f"{root}/{layout.MANIFEST}"
    try:
        if local_dst:
            fs.makedirs(root, exist_ok=True)
            tmp = f"{root}/.{layout.MANIFEST}.publishing"
            fs.pipe_file(tmp, data)
            fs.mv(tmp, target)
        else:
            fs.pipe_file(target, data)
    except Exception as e:  # noqa: BLE001 (any backend error, scrubbed)
        raise PublishError(f"{shown}/{layout.MANIFEST}: write failed: {_scrub(str(e), options)}") from None
