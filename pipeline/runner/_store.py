"""The product store: atomic product files, provenance sidecars, failure records.

Layout: ``<output_dir>/<night>/<stage>/<unit>/`` holds one file per product
(``<product>.fits``, ``.ecsv`` or ``.json``), the provenance sidecar
``_provenance.json`` and, after a failed attempt, ``_failed.json``.  ``<unit>``
is a stretch id (``s0003``) or ``night``.

Every file is written to a temporary name in the same folder, flushed to disk
(while its SHA-256 is computed) and renamed over its final name
(``os.replace`` is atomic on POSIX and Windows), so a reader never sees half
a file.  A unit is *done* only when its
sidecar exists, parses and lists product files that exist with the recorded
sizes; the sidecar is removed before a unit's products are replaced and
written after all of them, so a run killed at any point leaves the unit either
done (old or new) or not done, never half-done.

A product's content is checked against the SHA-256 its sidecar records
before it is read (:func:`verify_product`).  Hashing is the store's main
cost (~0.5 s of CPU per GB; each stretch's products are read by up to three
units, its own and its two neighbours' detect), so a process remembers
the digests of the files it has hashed (written or checked) with the file's
identity and times (device, inode, size, modification and change times) and
checks a file it remembers by those alone: a file rewritten or renamed over
gets a new inode or new times.  A file modified less than
:data:`SETTLE_SECONDS` before it was hashed is not remembered (a second
change within the file system's clock tick could leave its times as they
were, the "racy" case of version-control tools), nor are files on a file
system that keeps coarse times.  A worker hands what it remembers of the
files it wrote to the runner (:func:`known_digests`), which hands it to the
units of the same run that read them (:func:`learn_digests`): a stretch's
products are then hashed once, as they are written, whichever worker reads
them.  An explicit check of a night (:func:`verify_unit`) hashes every file.

A process also keeps the small tables it wrote, as their files read back,
and those it read (:func:`_keep_parsed`), by path and SHA-256: a read whose
file checks out with that digest gets a copy without parsing the text.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import threading
import time
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline.exceptions import DamagedProductError
from pipeline.runner._ecsv import ReadBack, read_ecsv, write_ecsv

if TYPE_CHECKING:
    from astropy.io import fits
    from astropy.table import Table

__all__ = [
    "DAMAGED_NAME",
    "FAILED_NAME",
    "SIDECAR_NAME",
    "LazyProducts",
    "LazyUnit",
    "atomic_write",
    "check_products",
    "clean_unit",
    "clear_failure",
    "hash_json",
    "known_digests",
    "learn_digests",
    "lost_product",
    "mark_damaged",
    "output_hash",
    "read_damage",
    "read_failure",
    "read_product",
    "read_products",
    "read_sidecar",
    "verify_product",
    "verify_unit",
    "write_failure",
    "write_products",
    "write_sidecar",
]

SIDECAR_NAME = "_provenance.json"
FAILED_NAME = "_failed.json"
DAMAGED_NAME = "_damaged.json"
SIDECAR_FORMAT = 1
_TEMP_MARK = ".tmp-"
#: Tables a night-wide stage's stretches are read ahead of its look-ups (see
#: :class:`LazyProducts`): two reads at once while the stage waits for one.
READ_AHEAD = 2


def hash_json(data: Any) -> str:
    """SHA-256 (hex) of ``data`` serialised as canonical JSON."""
    text = json.dumps(data, sort_keys=True, separators=(",", ":"), default=_json_default)
    return hashlib.sha256(text.encode()).hexdigest()


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, Path):
        return str(value)
    raise TypeError(
        f"{type(value).__name__} is not JSON-serialisable; return plain numbers, strings, "
        "lists and dicts in a JSON product, or a Table/array product instead."
    )


def _file_sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as stream:
        for chunk in iter(lambda: stream.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


# ------------------------------------------------------- digests this process knows

#: Seconds a file must have been left unmodified, when its state is taken,
#: for its digest to be remembered (see the module docstring): twice the
#: longest clock tick Linux stamps file times with (10 ms; a change after
#: that moment gets a later time).
SETTLE_SECONDS = 0.02
#: Files remembered at most (the oldest are forgotten first).
_KNOWN_MAX = 4096
#: ``path -> (identity and times, SHA-256)`` of files a process remembers.
Known = dict[str, tuple[tuple[int, ...], str]]
#: What this process remembers.
_KNOWN: Known = {}


def _identity(status: os.stat_result) -> tuple[int, ...]:
    return (
        status.st_dev,
        status.st_ino,
        status.st_size,
        status.st_mtime_ns,
        status.st_ctime_ns,
    )


def _remember(path: Path, digest: str, taken_ns: int, status: os.stat_result) -> None:
    """Remember ``path``'s digest, if the file had settled when its state was taken.

    ``status`` is the state of the file whose content has ``digest``, taken
    just after ``taken_ns`` (:func:`time.time_ns`).  Times in whole
    milliseconds mark a file system with coarse times, where a later change
    may keep them: such files are not remembered.
    """
    modified = status.st_mtime_ns
    if modified % 1_000_000 == 0 or taken_ns - modified < SETTLE_SECONDS * 1e9:
        return
    learn_digests({os.path.abspath(path): (_identity(status), digest)})


def known_digests(paths: Iterable[Path]) -> Known:
    """What this process remembers of ``paths`` (see the module docstring), by absolute path.

    For :func:`learn_digests` in another process of the same run.
    """
    keys = (os.path.abspath(path) for path in paths)
    return {key: _KNOWN[key] for key in keys if key in _KNOWN}


def learn_digests(known: Mapping[str, tuple[tuple[int, ...], str]]) -> None:
    """Remember files' digests, identities and times that :func:`known_digests` gave.

    Only for what a process of the same run remembered: such a file is then
    checked by its identity and times, as in the process that hashed it.
    """
    for key, (identity, digest) in known.items():
        _KNOWN.pop(key, None)
        _KNOWN[key] = (tuple(identity), digest)
    while len(_KNOWN) > _KNOWN_MAX:
        _KNOWN.pop(next(iter(_KNOWN)), None)


def _checked_sha256(path: Path, remembered: bool = True) -> str:
    """SHA-256 of a file: remembered if it is unchanged since this process hashed it."""
    taken_ns = time.time_ns()
    status = os.stat(path)
    known = _KNOWN.get(os.path.abspath(path)) if remembered else None
    if known is not None and known[0] == _identity(status):
        return known[1]
    digest = _file_sha256(path)
    if _identity(os.stat(path)) == _identity(status):  # not changed while hashed
        _remember(path, digest, taken_ns, status)
    return digest


def _temp_name(path: Path) -> Path:
    """A temporary name for ``path`` in its folder (:func:`clean_unit` removes such files)."""
    return path.with_name(f".{path.name}{_TEMP_MARK}{os.getpid()}-{uuid.uuid4().hex[:8]}")


def atomic_write(path: Path, write: Callable[[Path], None]) -> tuple[str, int]:
    """Write ``path`` via ``write(temp_path)`` and an atomic rename.

    Returns
    -------
    sha256 : str
        Hex digest of the written file.
    size : int
        Its size in bytes.
    """
    temp = _temp_name(path)
    try:
        write(temp)
        # The disk flush waits on the device and the digest on the CPU: both at
        # once, the flush finished before the rename all the same (the pool is
        # left first, waiting for the flush, while the file is still open).
        with (
            open(temp, "rb+") as stream,
            ThreadPoolExecutor(1, thread_name_prefix="zdrift-fsync") as flusher,
        ):
            flushed = flusher.submit(os.fsync, stream.fileno())
            digest = _file_sha256(temp)
            flushed.result()  # raises the flush's OSError here
        size = temp.stat().st_size
        os.replace(temp, path)
        _remember(path, digest, time.time_ns(), os.stat(path))
    finally:
        with contextlib.suppress(FileNotFoundError):
            temp.unlink()
    return digest, size


def _json_text(data: Any) -> str:
    return json.dumps(data, sort_keys=True, indent=1, default=_json_default) + "\n"


def _write_json_file(path: Path, data: Any) -> tuple[str, int]:
    text = _json_text(data)
    return atomic_write(path, lambda temp: temp.write_text(text, encoding="utf-8"))


# ------------------------------------------------------------------- product kinds


def _product_kind(name: str, value: Any) -> str:
    from astropy.io import fits
    from astropy.table import Table

    if isinstance(value, np.ndarray):
        if value.ndim == 0:
            raise TypeError(f"Product {name!r} is a 0-d array; return it in a dict instead.")
        return "array"
    if isinstance(value, fits.HDUList):
        return "hdulist"
    if isinstance(value, fits.PrimaryHDU | fits.ImageHDU):
        return "hdu"
    if isinstance(value, Table):
        return "table"
    if isinstance(value, Mapping | list):
        return "json"
    if isinstance(value, str):
        return "html"
    if isinstance(value, bytes) and value.startswith(PNG_SIGNATURE):
        return "png"
    raise TypeError(
        f"Product {name!r} has unsupported type {type(value).__name__}; return a "
        "numpy array, an astropy.io.fits HDU or HDUList, an astropy Table, a dict/list, "
        "a str (an HTML page) or the bytes of a PNG image."
    )


#: First bytes of every PNG file (the PNG specification, section 5.2).
PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"

_SUFFIX = {
    "array": ".fits",
    "hdu": ".fits",
    "hdulist": ".fits",
    "table": ".ecsv",
    "json": ".json",
    "html": ".html",
    "png": ".png",
}


def _with_cards(header: fits.Header, cards: Mapping[str, tuple[Any, str]]) -> fits.Header:
    header = header.copy()
    for key, (value, comment) in cards.items():
        header[key] = (value, comment)
    return header


def _writer(kind: str, value: Any, cards: Mapping[str, tuple[Any, str]]) -> Callable[[Path], None]:
    from astropy.io import fits

    if kind == "array":
        data = value.astype(np.uint8) if value.dtype == bool else value
        hdu = fits.PrimaryHDU(data=data, header=_with_cards(fits.Header(), cards))
        return lambda temp: hdu.writeto(temp)
    if kind == "hdu":
        hdu = fits.PrimaryHDU(data=value.data, header=_with_cards(value.header, cards))
        return lambda temp: hdu.writeto(temp, output_verify="fix")
    if kind == "hdulist":  # e.g. an image product (pipeline.products): cards on every HDU
        # New HDUs over the stage's planes (not copies of them: a stretch's planes
        # are tens of MB); only the headers are copied, to take the cards.
        hdul = fits.HDUList(
            [type(hdu)(data=hdu.data, header=_with_cards(hdu.header, cards)) for hdu in value]
        )
        # Born valid: a card astropy would have to fix is the stage's bug.
        return lambda temp: hdul.writeto(temp, output_verify="exception")
    if kind == "table":
        return _TableWriter(value)
    if kind == "html":
        return lambda temp: temp.write_text(value, encoding="utf-8")
    if kind == "png":
        return lambda temp: temp.write_bytes(value)
    text = _json_text(value)
    return lambda temp: temp.write_text(text, encoding="utf-8")


class _TableWriter:
    """Writes a table product, and keeps it as the file reads back if it is small.

    ``as_read`` then makes the table :func:`read_product` would read (of
    the class the stage returned) from the values in memory
    (:func:`~pipeline.runner._ecsv.write_ecsv`'s ``as_read``), or is None.
    """

    def __init__(self, table: Table):
        self.table = table
        self.as_read: ReadBack | None = None

    def __call__(self, temp: Path) -> None:
        from astropy.table import QTable, Table

        cls = QTable if isinstance(self.table, QTable) else Table  # as read_product reads it
        keep = _table_bytes(self.table) <= WRITTEN_BYTES
        self.as_read = write_ecsv(self.table, temp, as_read=cls if keep else None)


def check_products(products: Mapping[str, Any]) -> dict[str, str]:
    """Check product names and types before anything is written; return their kinds.

    Raises
    ------
    ValueError
        For a name that is not an identifier or starts with ``_``.
    TypeError
        For an object the store cannot write.
    """
    kinds = {}
    for name, value in products.items():
        if not (isinstance(name, str) and name.isidentifier() and not name.startswith("_")):
            raise ValueError(
                f"Product name {name!r} must be an identifier not starting with '_' "
                "(it becomes a file name)."
            )
        kinds[name] = _product_kind(name, value)
    return kinds


def write_products(
    unit_dir: Path, products: Mapping[str, Any], cards: Mapping[str, tuple[Any, str]]
) -> dict[str, dict[str, Any]]:
    """Write each product atomically; return the sidecar's ``products`` entry.

    Parameters
    ----------
    unit_dir : pathlib.Path
        The unit's folder (created if needed).
    products : mapping of str to object
        What the stage returned.
    cards : mapping of str to (value, comment)
        Provenance keywords added to FITS headers (deterministic values only,
        so that the same inputs give byte-identical files).
    """
    from astropy.table import QTable

    kinds = check_products(products)
    unit_dir.mkdir(parents=True, exist_ok=True)
    entries = {}
    for name, value in products.items():
        kind = kinds[name]
        file_name = name + _SUFFIX[kind]
        writer = _writer(kind, value, cards)
        digest, size = atomic_write(unit_dir / file_name, writer)
        if isinstance(writer, _TableWriter) and writer.as_read is not None:
            _keep_parsed(unit_dir / file_name, digest, writer.as_read)
        entry = {"file": file_name, "kind": kind, "sha256": digest, "size": size}
        if kind == "array":
            entry["dtype"] = value.dtype.str
        elif kind == "hdu":
            entry["class"] = type(value).__name__
        elif kind == "table":
            entry["class"] = "QTable" if isinstance(value, QTable) else "Table"
        entries[name] = entry
    return entries


def read_product(path: Path, entry: Mapping[str, Any]) -> Any:
    """Load one product file as the type the stage returned (``entry`` from the sidecar)."""
    from astropy.io import fits
    from astropy.table import QTable, Table

    kind = entry["kind"]
    if kind == "array":
        with fits.open(path, memmap=False) as hdul:
            return np.asarray(hdul[0].data, dtype=np.dtype(entry["dtype"]))
    if kind == "hdu":
        with fits.open(path, memmap=False) as hdul:
            cls = fits.ImageHDU if entry.get("class") == "ImageHDU" else fits.PrimaryHDU
            return cls(data=hdul[0].data, header=hdul[0].header)
    if kind == "hdulist":
        # Each HDU's data read while the file is open, then the file closed:
        # the planes as read, not copies of them (44 MB a calibrated stretch).
        with fits.open(path, memmap=False) as hdul:
            for hdu in hdul:
                hdu.data  # noqa: B018 (reads it)
        return hdul
    if kind == "table":
        cls = QTable if entry.get("class") == "QTable" else Table
        return _read_ecsv(path, cls)
    if kind == "html":
        return path.read_text(encoding="utf-8")
    if kind == "png":
        return path.read_bytes()
    return json.loads(path.read_text(encoding="utf-8"))


def file_digest(path: Path) -> str:
    """SHA-256 hex digest of a file's content."""
    return _file_sha256(Path(path))


def read_external(path: Path) -> Any:
    """Read a file a stage option names (see ``Stage.files``), by its suffix.

    ``.ecsv``: an astropy Table; ``.fits``/``.fit``/``.fts`` (optionally
    gzipped): the first table HDU as a Table, else the primary image as an
    array; ``.json``: the JSON value.
    """
    from astropy.io import fits
    from astropy.table import Table

    path = Path(path)
    suffixes = [s.lower() for s in path.suffixes if s.lower() != ".gz"]
    kind = suffixes[-1] if suffixes else ""
    if kind == ".ecsv":
        return _read_ecsv(path, Table)
    if kind in (".fits", ".fit", ".fts"):
        with fits.open(path, memmap=False) as hdul:
            for hdu in hdul:
                if isinstance(hdu, fits.BinTableHDU | fits.TableHDU):
                    return Table.read(hdu)
            return np.asarray(hdul[0].data)
    if kind == ".json":
        return json.loads(path.read_text(encoding="utf-8"))
    raise ValueError(
        f"{path}: cannot tell how to read a {kind or 'suffix-less'} file; give an .ecsv, "
        ".fits or .json file."
    )


def _read_ecsv(path: Path, cls: type[Table]) -> Table:
    """Read an ECSV table; also one with no rows and vector columns.

    astropy (up to 8.0 at least) writes a valid ECSV file for a table with no
    rows and a vector column (subtype ``'float32[5]'``) but cannot read it
    back ("shape mismatch"); such a table is rebuilt from the file's header.
    """
    from astropy.table.meta import get_header_from_yaml

    try:
        return read_ecsv(path, cls)
    except ValueError:
        lines = path.read_text(encoding="utf-8").splitlines()
        body = [line for line in lines if not line.startswith("#")]
        if len(body) > 1:
            raise  # the table has rows: a real error
        # Lines after '# %ECSV 1.0' and '# ---' hold the YAML header.
        header = get_header_from_yaml(line[2:] for line in lines[2:] if line.startswith("# "))
        table = cls(meta=header.get("meta") or {})
        for column in header["datatype"]:
            dtype, _, shape = column.get("subtype", column["datatype"]).partition("[")
            dims = tuple(int(n) for n in shape.rstrip("]").split(",")) if shape else ()
            dtype = "U1" if dtype == "string" else dtype
            table[column["name"]] = np.zeros((0, *dims), dtype=dtype)
            if column.get("unit"):
                table[column["name"]].unit = column["unit"]
        return table


def verify_product(path: Path, entry: Mapping[str, Any], remembered: bool = True) -> str:
    """Check a product file against the SHA-256 its sidecar records; return the digest.

    A file this process remembers (see the module docstring) is checked by
    its identity and times, unless ``remembered`` is False.

    Raises
    ------
    DamagedProductError
        If the file cannot be read or its content differs from the record.
    """
    try:
        digest = _checked_sha256(Path(path), remembered)
    except OSError as exc:
        raise DamagedProductError(path, f"cannot be read ({exc.strerror or exc})") from None
    if digest != entry.get("sha256"):
        raise DamagedProductError(
            path,
            f"content changed since it was written (SHA-256 {digest[:12]}..., recorded "
            f"{str(entry.get('sha256'))[:12]}...)",
        )
    return digest


def verify_unit(unit_dir: Path, sidecar: Mapping[str, Any]) -> None:
    """Check every product file a sidecar lists, hashing each (see :func:`verify_product`)."""
    for entry in sidecar["products"].values():
        verify_product(unit_dir / entry["file"], entry, remembered=False)


def read_products(
    unit_dir: Path, sidecar: Mapping[str, Any], read: dict[str, str] | None = None
) -> dict[str, Any]:
    """Load every product a valid sidecar lists, as the types the stage returned.

    Each file's content is checked against its recorded SHA-256 first, so a
    damaged product is never consumed.

    Parameters
    ----------
    unit_dir : pathlib.Path
        The unit's folder.
    sidecar : mapping
        Its provenance record.
    read : dict, optional
        Filled with ``'<stage>/<unit>/<file>' -> SHA-256`` of each file read.

    Raises
    ------
    DamagedProductError
        A file cannot be read, or differs from its record; the message names it.
    """
    return {
        name: _read_checked(Path(unit_dir) / entry["file"], entry, read)
        for name, entry in sidecar["products"].items()
    }


def _read_checked(
    path: Path,
    entry: Mapping[str, Any],
    read: dict[str, str] | None,
    files: contextlib.ExitStack | None = None,
) -> Any:
    """One product, checked against its SHA-256 first (see :func:`read_products`).

    With ``files`` given, an HDU list is returned opened lazily (no memmap,
    ``lazy_load_hdus``): ``hdul[ext].section[...]`` then reads only the part
    asked for, and ``files`` closes it.
    """
    digest, value = _load_checked(path, entry, files)
    _note_read(read, path, digest)
    return value


#: Table products of at most this many bytes are kept parsed by the process
#: that read them, by path and SHA-256, and handed out as copies: the night's
#: block index is read by every unit of three stages (astropy's reader takes
#: 5-15 ms for its few rows, mostly the header).
PARSED_BYTES = 1 << 20
#: A table product whose values take at most this many bytes is kept by the
#: process that writes it, as the file reads back (see :func:`_keep_parsed`).
WRITTEN_BYTES = 4 << 20
#: Tables kept (read or written) at most, and their values' bytes at most
#: together: the oldest are dropped first.  On a 4096-column camera a
#: stretch's column statistics hold 0.8 MB, written before the flow (the
#: column solve finds a worker's 16 of a 32-stretch night kept), and the flow
#: writes ~1 MB per stretch (detect's catalogue 0.5, rectify's smear kernels
#: 0.4), so the catalogue finds the last ~16 stretches' of its worker kept.
_PARSED_MAX = 256
PARSED_TOTAL_BYTES = 16 << 20
#: ``(absolute path, SHA-256) -> (table or what makes it, bytes of its values)``,
#: oldest first.
_PARSED: dict[tuple[str, str], tuple[Table | ReadBack, int]] = {}
_PARSED_LOCK = threading.Lock()


def _table_bytes(table: Table) -> int:
    """Bytes of a table's values (its columns' arrays; a column without ``nbytes`` counts 0)."""
    return sum(getattr(column, "nbytes", 0) for column in table.itercols())


def _keep_parsed(path: Path, digest: str, table: Table | ReadBack) -> None:
    """Keep ``table``, the parsed content of ``path`` whose SHA-256 is ``digest``
    (or the :class:`~pipeline.runner._ecsv.ReadBack` that makes it).

    A later read of the file that finds this digest (checked against the file
    as every read is, :func:`verify_product`) gets a copy instead of parsing
    the file again (:func:`_load_checked`): a product written by a worker is
    handed to the units of later stages that run in the same worker without
    being parsed (the column solve's 32 statistics tables, 80 MB of text, took
    ~0.9 s of its 1.7 s on the 4096 x 16 x 2048 night; the catalogue's 32
    detect catalogues ~0.5 s), and the others are parsed as before.
    """
    size = table.nbytes if isinstance(table, ReadBack) else _table_bytes(table)
    with _PARSED_LOCK:
        key = (os.path.abspath(path), digest)
        _PARSED.pop(key, None)
        _PARSED[key] = (table, size)
        total = sum(kept for _, kept in _PARSED.values())
        while len(_PARSED) > _PARSED_MAX or total > PARSED_TOTAL_BYTES:
            total -= _PARSED.pop(next(iter(_PARSED)))[1]


def _parsed(path: Path, digest: str) -> Table | None:
    """A copy of the table kept for ``path`` of content ``digest``, or None."""
    with _PARSED_LOCK:
        kept = _PARSED.get((os.path.abspath(path), digest))
    if kept is None:
        return None
    table = kept[0].table() if isinstance(kept[0], ReadBack) else kept[0]
    return None if table is None else table.copy()


def _load_checked(
    path: Path, entry: Mapping[str, Any], files: contextlib.ExitStack | None = None
) -> tuple[str, Any]:
    """``(SHA-256, value)`` of one product, checked first (see :func:`_read_checked`)."""
    from astropy.io import fits

    digest = verify_product(path, entry)
    parsed = _parsed(path, digest) if entry["kind"] == "table" else None
    if parsed is not None:
        return digest, parsed
    try:
        if files is not None and entry["kind"] == "hdulist":
            value = files.enter_context(fits.open(path, memmap=False, lazy_load_hdus=True))
        else:
            value = read_product(path, entry)
    except Exception as exc:  # a file that hashes right but does not parse
        reason = f"cannot be read ({type(exc).__name__}: {exc})"
        raise DamagedProductError(path, reason) from exc
    if entry["kind"] == "table" and entry.get("size", np.inf) <= PARSED_BYTES:
        _keep_parsed(path, digest, value.copy())
    return digest, value


def _note_read(read: dict[str, str] | None, path: Path, digest: str) -> None:
    """Record in ``read`` that the stage read ``path`` (``'<stage>/<unit>/<file>'``)."""
    if read is not None:
        read[f"{path.parent.parent.name}/{path.parent.name}/{path.name}"] = digest


class _ReadAhead:
    """One table product read (and checked) in a thread of its own, for a later look-up."""

    def __init__(self, path: Path, entry: Mapping[str, Any]):
        self._outcome: tuple[str, Any] | None = None
        self._error: BaseException | None = None
        self._thread = threading.Thread(
            target=self._read, args=(path, entry), name="zdrift-read-ahead", daemon=True
        )
        self._thread.start()

    def _read(self, path: Path, entry: Mapping[str, Any]) -> None:
        try:
            self._outcome = _load_checked(path, entry)
        except BaseException as exc:  # raised where the stage looks the product up
            self._error = exc

    def join(self) -> None:
        """Wait until the read has ended."""
        self._thread.join()

    def result(self) -> tuple[str, Any]:
        """``(SHA-256, value)``, once read; the read's error, if it failed."""
        self.join()
        if self._error is not None:
            raise self._error
        return self._outcome


class LazyUnit(Mapping):
    """One unit's products as a read-only mapping; each product is read when looked up.

    Image products (HDU lists) come opened lazily when ``files`` is given (see
    :func:`_read_checked`), so a stage can read a few columns of a
    neighbouring stretch without loading its planes.  Every file is checked
    against its recorded SHA-256 before use.
    """

    def __init__(
        self,
        unit_dir: Path,
        sidecar: Mapping[str, Any],
        read: dict[str, str] | None = None,
        files: contextlib.ExitStack | None = None,
        source: tuple[LazyProducts, int] | None = None,
    ):
        self._unit_dir = Path(unit_dir)
        self._entries = dict(sidecar["products"])
        self._read = read
        self._files = files
        self._source = source  # (the sequence, this unit's index in it), see LazyProducts
        self._loaded: dict[str, Any] = {}

    def __getitem__(self, name: str) -> Any:
        if name not in self._loaded:
            entry = self._entries[name]
            path = self._unit_dir / entry["file"]
            if self._source is None:
                self._loaded[name] = _read_checked(path, entry, self._read, self._files)
            else:
                sequence, index = self._source
                self._loaded[name] = sequence._take(index, name, path, entry)
        return self._loaded[name]

    def __iter__(self) -> Iterator[str]:
        return iter(self._entries)

    def __len__(self) -> int:
        return len(self._entries)

    def __repr__(self) -> str:
        return f"LazyUnit({self._unit_dir}, products={list(self._entries)})"


class LazyProducts(Sequence):
    """Read-only sequence of per-stretch products, each read when looked up.

    Each item is a :class:`LazyUnit`: a night-wide stage that needs one
    product of every stretch (their catalogues), or one header of one stretch,
    reads only that, not every plane of every stretch.  With ``files`` given,
    image products come opened lazily and ``files`` closes them.

    A table looked up in one stretch's products is read ahead in the next
    ``read_ahead`` stretches' (a thread per file: the text parse and the
    SHA-256 run outside Python's lock, so two files are read at once on two
    cores): a night-wide stage that goes through the stretches' tables in
    order (the column solve's 32 statistics tables, 80 MB of text on a
    4096-column night) finds them read.  Each table is still checked against
    its recorded SHA-256, recorded in ``read`` and its error raised only when
    the stage looks it up; a table read ahead and never looked up is dropped,
    its read waited for when ``files`` closes (no thread outlives the unit).
    """

    def __init__(
        self,
        units: Sequence[tuple[Path, Mapping[str, Any]]],
        read: dict[str, str] | None = None,
        files: contextlib.ExitStack | None = None,
        read_ahead: int = READ_AHEAD,
    ):
        self._units = list(units)
        self._read = read
        self._files = files
        self._read_ahead = read_ahead
        self._ahead: dict[tuple[int, str], _ReadAhead] = {}
        if files is not None:
            files.callback(self._drop_reads_ahead)

    def __len__(self) -> int:
        return len(self._units)

    def __getitem__(self, index: int | slice) -> Any:
        if isinstance(index, slice):
            return [self[i] for i in range(*index.indices(len(self)))]
        unit_dir, sidecar = self._units[index]
        index = range(len(self))[index]  # negative indices count from the end
        return LazyUnit(unit_dir, sidecar, self._read, self._files, source=(self, index))

    def __iter__(self) -> Iterator[dict[str, Any]]:
        for index in range(len(self)):
            yield self[index]

    def _take(self, index: int, name: str, path: Path, entry: Mapping[str, Any]) -> Any:
        """Product ``name`` of unit ``index``: read ahead or read now; read the next ahead."""
        pending = self._ahead.pop((index, name), None)
        if entry["kind"] == "table":
            self._start_reading(index, name)
        if pending is None:
            digest, value = _load_checked(path, entry, self._files)
        else:
            digest, value = pending.result()
        _note_read(self._read, path, digest)
        return value

    def _drop_reads_ahead(self) -> None:
        """Wait for the reads ahead that the stage did not look up, and drop them."""
        for pending in self._ahead.values():
            pending.join()
        self._ahead.clear()

    def _start_reading(self, index: int, name: str) -> None:
        """Start reading table ``name`` of the ``read_ahead`` units after ``index``."""
        for later in range(index + 1, min(index + 1 + self._read_ahead, len(self))):
            unit_dir, sidecar = self._units[later]
            entry = sidecar["products"].get(name)
            if (later, name) in self._ahead or entry is None or entry["kind"] != "table":
                continue
            self._ahead[(later, name)] = _ReadAhead(Path(unit_dir) / entry["file"], entry)


def output_hash(products: Mapping[str, Mapping[str, Any]]) -> str:
    """Hash identifying a unit's outputs: over its products' names and digests."""
    return hash_json({name: entry["sha256"] for name, entry in products.items()})


# ------------------------------------------------------------------------- sidecars


def read_sidecar(unit_dir: Path) -> dict[str, Any] | None:
    """The unit's provenance record if the unit is complete, else None.

    Complete means: the sidecar parses, has the current format, and every
    product file it lists exists with the recorded size.
    """
    record = _parse_sidecar(unit_dir)
    if record is None or lost_product(unit_dir, record) is not None:
        return None
    return record


def _parse_sidecar(unit_dir: Path) -> dict[str, Any] | None:
    """The sidecar as written, if it parses and has the current format, else None."""
    try:
        record = json.loads((unit_dir / SIDECAR_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    if not isinstance(record, dict) or record.get("format") != SIDECAR_FORMAT:
        return None
    return record


def lost_product(unit_dir: Path, record: Mapping[str, Any] | None = None) -> str | None:
    """What became of a product its unit's sidecar lists but no longer finds as written.

    A product file removed, or changed in size, after its unit was made
    (by hand, a copy cut short): the unit is then not complete, and this
    says why, ``'<file> <what>'`` (None when every listed file is there
    with its recorded size, or when there is no valid sidecar to ask).
    Only sizes are looked at; a change of content that keeps the size
    needs a SHA-256 check (:func:`verify_unit`).  A sidecar that is no
    longer a JSON object (written atomically, it was edited by hand) is
    named too; one of another format is not (an older release's unit).
    """
    if record is None:
        try:
            record = json.loads((unit_dir / SIDECAR_NAME).read_text(encoding="utf-8"))
        except FileNotFoundError:
            return None
        except OSError as exc:
            return f"{SIDECAR_NAME} cannot be read ({exc.strerror or exc})"
        except ValueError:
            record = None
        if not isinstance(record, dict):
            return f"{SIDECAR_NAME}, the provenance record, is not a JSON object (edited by hand?)"
        if record.get("format") != SIDECAR_FORMAT:
            return None
    products = record.get("products", {})
    if not isinstance(products, dict):
        return "the provenance record lists no products it can read"
    for entry in products.values():
        try:
            name, size = str(entry["file"]), int(entry["size"])
        except (KeyError, TypeError, ValueError):
            return "the provenance record lists a product without its file name or size"
        try:
            found = (unit_dir / name).stat().st_size
        except FileNotFoundError:
            return f"{name} is gone since its unit was made (removed or renamed by hand?)"
        except OSError as exc:
            return f"{name} cannot be read ({exc.strerror or exc})"
        if found != size:
            return (
                f"{name} has {found} bytes, {size} when its unit was made "
                "(changed on disk, or a copy cut short)"
            )
    return None


def write_sidecar(unit_dir: Path, record: dict[str, Any]) -> None:
    """Write the provenance sidecar (last step of a unit) atomically."""
    _write_json_file(unit_dir / SIDECAR_NAME, {"format": SIDECAR_FORMAT, **record})
    with contextlib.suppress(OSError):  # make the rename durable where supported
        fd = os.open(unit_dir, os.O_RDONLY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


@contextlib.contextmanager
def clean_unit(unit_dir: Path, keep: Sequence[str] = ()) -> Iterator[None]:
    """Within the block, a unit folder ready for new products; after it, the old files gone.

    Removes the sidecar first (from now on the unit is not done) and any
    damage record.  Leftover temporary files of killed runs and product
    files not in ``keep`` are renamed to temporary names as the block starts
    (the folder then holds none of the old products, and a run killed in the
    block leaves them for the next clean) and removed in a thread while the
    block writes the new ones: removing a file waits for the file system to
    free its blocks, ~30 ms for a 47 MB stretch image on an ext4 disk, once
    per image in every unit of a forced rerun.  On leaving the block the
    thread has ended; an error of a removal is raised then (unless the block
    raised one).
    """
    for name in (SIDECAR_NAME, DAMAGED_NAME):
        with contextlib.suppress(FileNotFoundError):
            (unit_dir / name).unlink()
    doomed = []
    if unit_dir.is_dir():
        for path in unit_dir.iterdir():
            is_temp = path.name.startswith(".") and _TEMP_MARK in path.name
            is_old_product = not path.name.startswith((".", "_")) and path.name not in keep
            if path.is_file() and is_temp:
                doomed.append(path)
            elif path.is_file() and is_old_product:
                doomed.append(path.rename(_temp_name(path)))
    if not doomed:
        yield
        return
    errors: list[OSError] = []

    def remove() -> None:
        for path in doomed:
            try:
                path.unlink(missing_ok=True)
            except OSError as exc:
                errors.append(exc)

    remover = threading.Thread(target=remove, name="zdrift-clean", daemon=True)
    remover.start()
    try:
        yield
    finally:
        remover.join()
    if errors:
        raise errors[0]


def write_failure(unit_dir: Path, record: dict[str, Any]) -> None:
    """Record why the last attempt at a unit failed."""
    unit_dir.mkdir(parents=True, exist_ok=True)
    _write_json_file(unit_dir / FAILED_NAME, record)


def read_failure(unit_dir: Path) -> dict[str, Any] | None:
    """The failure record of the unit's last attempt, or None."""
    try:
        return json.loads((unit_dir / FAILED_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def clear_failure(unit_dir: Path) -> None:
    """Forget a previous failure (before a new attempt)."""
    with contextlib.suppress(FileNotFoundError):
        (unit_dir / FAILED_NAME).unlink()


def mark_damaged(unit_dir: Path, reason: str) -> None:
    """Take a unit with a damaged product out of use until it is recomputed.

    The sidecar is moved into ``_damaged.json`` (with the reason), so the unit
    is no longer done and nothing reads its products; :func:`clean_unit`
    removes the record when the unit is written again.
    """
    record = _parse_sidecar(unit_dir)  # kept even when a product it lists is gone
    _write_json_file(unit_dir / DAMAGED_NAME, {"reason": reason, "provenance": record})
    with contextlib.suppress(FileNotFoundError):
        (unit_dir / SIDECAR_NAME).unlink()


def read_damage(unit_dir: Path) -> str | None:
    """Why the unit was taken out of use as damaged (see :func:`mark_damaged`), or None."""
    try:
        record = json.loads((unit_dir / DAMAGED_NAME).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return str(record.get("reason", "damaged")) if isinstance(record, dict) else "damaged"
