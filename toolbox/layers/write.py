"""Writing results: a table or layer on disk without ever leaving a half-written file or
touching layers that were already there."""

from __future__ import annotations

import contextlib
import datetime
import errno
import json
import os
import re
import shutil
import signal
import struct
import tempfile
import threading
import time
import warnings
from collections.abc import Iterator, Sequence
from pathlib import Path

import pandas as pd
import pyogrio

from .. import interrupts
from ..errors import OutputError, PairspreadError, ParameterError, param_noun, spell
from ..tables import csv_text
from .batched import FrameBatches, write_batches
from .read import _first_line, _is_frame

__all__ = [
    "TABLE_FORMATS",
    "LAYER_FORMATS",
    "output_format",
    "stdout_format",
    "shapefile_names",
    "check_output",
    "write_output",
    "provenance",
    "SIDECAR_SUFFIX",
]

#: suffix added to a CSV or Shapefile output's name for its provenance record
SIDECAR_SUFFIX = ".json"
#: key of the provenance record in Parquet metadata and GeoPackage metadata
PROVENANCE_KEY = "pairspread"

#: output formats by suffix, for attribute tables and for layers (geometry kept)
TABLE_FORMATS = {".gpkg": "gpkg", ".csv": "csv", ".parquet": "parquet"}
LAYER_FORMATS = {".gpkg": "gpkg", ".shp": "shp", ".geojson": "geojson", ".parquet": "parquet"}
_SHAPEFILE_PARTS = (".shp", ".shx", ".dbf", ".prj", ".cpg")

#: outputs this process has put in place, oldest first: an interrupt that arrives after the
#: rename must not be reported as "no output was written"
COMMITTED: list[str] = []
#: how long a writer waits for another pairspread run writing into the same file
LOCK_WAIT_SECONDS = 600.0
#: how often a GeoPackage changed by another program while we wrote is copied again
_FOREIGN_CHANGE_RETRIES = 3

try:  # advisory locks: POSIX; elsewhere only the check that the file did not change applies
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None


def lock_path(target: Path) -> Path:
    """The lock file beside ``target`` that every pairspread run writing into it takes."""
    return target.parent / f".{target.name}.lock"


@contextlib.contextmanager
def writer_lock(target: Path, *, wait: float | None = None) -> Iterator[None]:
    """Serialise every pairspread run that writes into ``target`` (an advisory lock).

    Runs writing different tables into one GeoPackage each copy the file, add their table and
    rename the copy over it; without this lock a later rename drops an earlier table. The lock
    file (``.NAME.lock`` beside the output) is removed when the write is done; one left by a
    killed run is harmless and is reused. Waiting longer than ``wait`` seconds fails loudly.
    """
    if fcntl is None:  # pragma: no cover - Windows
        yield
        return
    wait = LOCK_WAIT_SECONDS if wait is None else wait
    path = lock_path(target)
    deadline = time.monotonic() + wait
    while True:
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666 & ~_umask())
        try:
            while True:
                try:
                    fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                    break
                except BlockingIOError:
                    if time.monotonic() > deadline:
                        raise OutputError(
                            f"Another run has been writing into {str(target)!r} for over {wait:g} s "
                            f"(it holds {path.name}); nothing was written. Run again when it is done."
                        ) from None
                    time.sleep(0.02)
            # the holder before us may have removed the file we locked: then lock the new one
            try:
                same = os.path.samestat(os.fstat(fd), os.stat(path))
            except FileNotFoundError:
                same = False
        except BaseException:
            os.close(fd)
            raise
        if same:
            break
        os.close(fd)
    try:
        yield
    finally:
        with contextlib.suppress(OSError):
            os.unlink(path)  # still holding the lock, so nobody is between open and lock on it
        os.close(fd)


@contextlib.contextmanager
def _interrupts_deferred() -> Iterator[None]:
    """Take a Ctrl-C that arrives inside the block when the block is done, not in between.

    Only the main thread may change the handler, and only Python's own handler is replaced.
    """
    if (
        threading.current_thread() is not threading.main_thread()
        or not interrupts.is_ours(signal.getsignal(signal.SIGINT))
    ):
        yield
        return
    pending = []
    previous = signal.signal(signal.SIGINT, lambda signum, frame: pending.append(signum))
    try:
        yield
    finally:
        signal.signal(signal.SIGINT, previous)
    if pending:
        raise KeyboardInterrupt
    interrupts.check()


def _signature(path: Path) -> tuple | None:
    """What tells whether a file was changed or replaced: inode, size, modification time."""
    try:
        st = os.stat(path)
    except FileNotFoundError:
        return None
    return (st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns)


def output_format(path: str, what: str = "table") -> str:
    """Format name of an output path: the suffix decides; ``-`` is standard output."""
    formats = TABLE_FORMATS if what == "table" else LAYER_FORMATS
    if path == "-":
        return "stdout"
    suffix = Path(path).suffix.lower()
    if what == "table" and suffix in LAYER_FORMATS and suffix not in formats:
        raise OutputError(
            f"This script writes a table of numbers per group, without geometry, so it cannot be "
            f"written as {path!r} ({suffix} holds features with geometry); end the output with "
            f"{', '.join(formats)}, or use '-' for CSV on standard output."
        )
    if what == "layer" and suffix in TABLE_FORMATS and suffix not in formats:
        raise OutputError(
            f"This result is a layer with geometry, which "
            f"{path!r} ({suffix}) cannot hold; end the output with {', '.join(formats)}, or use '-' "
            "for GeoJSON on standard output."
        )
    if suffix not in formats:
        raise OutputError(
            f"Cannot tell the output format of {path!r}; end it with {', '.join(formats)} "
            "or use '-' for standard output."
        )
    return formats[suffix]


def stdout_format(what: str = "table", chosen: str | None = None) -> str:
    """What ``-`` writes: ``chosen`` (``--output-format``), else CSV for a table, GeoJSON for a layer."""
    from .pipe import STDOUT_FORMATS

    if chosen is not None and chosen not in STDOUT_FORMATS:
        raise ParameterError(
            f"The {param_noun('output_format')} must be one of {', '.join(STDOUT_FORMATS)}. "
            f"Got {chosen!r} instead."
        )
    return chosen or ("csv" if what == "table" else "geojson")


def _check_folder(path: Path):
    folder = path.parent if str(path.parent) else Path(".")
    if not folder.is_dir():
        raise OutputError(f"The output folder {str(folder)!r} does not exist; create it first.")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise OutputError(f"The output folder {str(folder)!r} is not writable; choose another output.")


def _gpkg_layers(path: Path) -> list[str]:
    with open(path, "rb") as handle:  # a GeoPackage is an SQLite file, whatever its name
        header = handle.read(16)
    if header != b"SQLite format 3\x00":
        raise OutputError(
            f"The existing file {str(path)!r} cannot be opened as a GeoPackage (it is not an "
            "SQLite file); it was left untouched. Choose another output."
        )
    for sidecar in ("-wal", "-journal"):
        if Path(str(path) + sidecar).exists():
            raise OutputError(
                f"{str(path)!r} seems to be open in another program ({path.name}{sidecar} exists); "
                "close it and try again."
            )
    try:
        return [str(row[0]) for row in pyogrio.list_layers(path)]
    except Exception as exc:
        raise OutputError(
            f"The existing file {str(path)!r} cannot be opened as a GeoPackage "
            f"({_first_line(exc)}); it was left untouched. Choose another output."
        ) from exc


def _holds_only(path: Path, layer_name: str) -> bool:
    """Whether a GeoPackage's only table of its own (not GeoPackage or SQLite bookkeeping, nor
    the spatial index) is ``layer_name``; False if that cannot be told."""
    import sqlite3

    own = layer_name.lower()
    try:
        with contextlib.closing(sqlite3.connect(f"{path.resolve().as_uri()}?mode=ro", uri=True)) as db:
            names = [str(row[0]).lower() for row in db.execute("SELECT name FROM sqlite_master WHERE type = 'table'")]
    except sqlite3.Error:
        return False
    bookkeeping = ("gpkg_", "gpkgext_", "sqlite_", f"rtree_{own}_")
    return [n for n in names if not n.startswith(bookkeeping)] == [own]


@contextlib.contextmanager
def _unsynced_sqlite() -> Iterator[None]:
    """SQLite without its journal and per-transaction syncs while a temporary file is written.

    The file is new and private until it is renamed into place: a failure discards it whole,
    so a rollback journal protects nothing, and :func:`_flush_to_disk` syncs it once before
    the rename.
    """
    options = {"OGR_SQLITE_SYNCHRONOUS": "OFF", "OGR_SQLITE_JOURNAL": "OFF"}
    previous = {key: pyogrio.get_gdal_config_option(key) for key in options}
    pyogrio.set_gdal_config_options(options)
    try:
        yield
    finally:
        pyogrio.set_gdal_config_options(previous)


def _flush_to_disk(path: Path) -> None:
    """Sync a written file to disk before it is renamed over the output."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


def _shorten(name: str, limit: int = 10) -> str:
    """``name`` cut to at most ``limit`` bytes of UTF-8, never inside a character."""
    cut = name.encode("utf-8")[:limit]
    return cut.decode("utf-8", errors="ignore")


def shapefile_names(fields: Sequence[str]) -> dict[str, str]:
    """Field names as a Shapefile will hold them (10 bytes), refusing any that would collide."""
    names: dict[str, str] = {}
    taken: dict[str, str] = {}
    for name in fields:
        short = _shorten(name)
        if short.lower() in taken:
            raise OutputError(
                f"Fields {taken[short.lower()]!r} and {name!r} would both become {short!r} in a "
                "Shapefile (10-character field names); rename one or write a "
                "GeoPackage instead."
            )
        taken[short.lower()] = name
        names[name] = short
    return names


#: longest text a .dbf field holds, in bytes (dBASE's limit; common practice)
_DBF_TEXT_BYTES = 254


def _warn_long_texts(frame: pd.DataFrame, fields: Sequence[str]) -> None:
    """Say which text fields a Shapefile will cut at 254 bytes (GDAL cuts them quietly)."""
    cut = []
    for name in fields:
        column = frame[name]
        if pd.api.types.is_object_dtype(column) or pd.api.types.is_string_dtype(column):
            longest = max((len(str(v).encode("utf-8")) for v in column.dropna()), default=0)
            if longest > _DBF_TEXT_BYTES:
                cut.append(repr(str(name)))
    if cut:
        warnings.warn(
            f"Shapefile text fields hold at most {_DBF_TEXT_BYTES} bytes, so the longer values of "
            f"{', '.join(cut)} are cut; write a GeoPackage (.gpkg) to keep them whole.",
            UserWarning,
            stacklevel=3,
        )


def _shapefile_parts(target: Path) -> list[Path]:
    return [target.with_suffix(suffix) for suffix in _SHAPEFILE_PARTS]


def check_output(
    path: str,
    *,
    what: str = "table",
    layer_name: str = "",
    overwrite: bool = False,
    inputs=(),
    fields: Sequence[str] = (),
    stdout_as: str | None = None,
    sidecar: bool = False,
) -> None:
    """Refuse, before any work is done, an output that cannot or must not be written.

    Parameters
    ----------
    path : str
        Output path; its suffix picks the format (see ``TABLE_FORMATS`` and ``LAYER_FORMATS``).
    what : {"table", "layer"}
        An attribute table, or a layer with geometry.
    layer_name : str
        Table or layer name inside a GeoPackage.
    overwrite : bool
        Whether an existing table, layer or file may be replaced.
    inputs : sequence of (path, layer) pairs
        Layers being read, which are never replaced.
    fields : sequence of str
        Field names of a layer output, checked against Shapefile's 10-character limit.
    stdout_as : {"csv", "geojson", "geoparquet"}, optional
        Format written when ``path`` is ``-`` (``--output-format``); a file's suffix decides
        its own format, so naming one for a file is refused.
    sidecar : bool
        Whether a provenance sidecar (output name + ``.json``) will be written beside a CSV or
        Shapefile output; an existing one is replaced only with ``overwrite``.
    """
    kind = output_format(path, what)
    if kind == "stdout":
        stdout_format(what, stdout_as)
        return
    if stdout_as is not None:
        raise ParameterError(
            f"{spell('output_format')} chooses the format of standard output ({spell('output', '-')}) only; the suffix "
            f"of {path!r} chooses its format. Leave out {spell('output_format')} or write to '-'."
        )
    target = Path(path)
    _check_folder(target)
    note = Path(path + SIDECAR_SUFFIX)
    if sidecar and kind in ("csv", "shp") and note.exists() and not overwrite:
        raise OutputError(
            f"{str(note)!r} (where the provenance record of {path!r} goes) already exists; pass "
            f"{spell('overwrite', True)} to replace it, or {spell('no_sidecar', True)} to write none."
        )
    if target.is_dir():
        raise OutputError(f"The output {path!r} is a folder; name a file.")
    for in_path, in_layer in inputs:
        same = target.exists() and Path(in_path).exists() and os.path.samefile(in_path, target)
        if same and kind == "gpkg" and in_layer is None:
            names = _gpkg_layers(target)  # the layer that will be read is the only one
            in_layer = names[0] if len(names) == 1 else None
        # GeoPackage table names ignore case (SQLite), so 'HOMES' is the layer 'homes'
        if same and (kind != "gpkg" or (in_layer or "").lower() == layer_name.lower()):
            raise OutputError(
                f"The output {path!r} would replace the input; choose another "
                f"{spell('output_layer') if kind == 'gpkg' else spell('output')}."
            )
    if kind == "gpkg":
        if not layer_name:
            raise ParameterError("The output layer name must not be empty.")
        if target.exists():
            names = [n.lower() for n in _gpkg_layers(target)]  # GeoPackage names ignore case
            if layer_name.lower() in names and not overwrite:
                raise OutputError(
                    f"{path!r} already has a layer {layer_name!r}; pass {spell('overwrite', True)} to "
                    f"replace it or choose another {spell('output_layer')}."
                )
        return
    if kind == "shp":
        shapefile_names(fields)  # refuses names that would collide once shortened
        existing = [p for p in _shapefile_parts(target) if p.exists()]
        if existing and not overwrite:
            raise OutputError(f"{path!r} already exists; pass {spell('overwrite', True)} to replace it.")
        return
    if target.exists() and not overwrite:
        raise OutputError(f"{path!r} already exists; pass {spell('overwrite', True)} to replace it.")


def _disk_cause(folder: Path | None, exc: BaseException | None = None) -> str:
    """A sentence on the disk or a file-size limit, when one of them can be behind a failed write.

    Only then may a message blame the disk: from the error number, the disk's free space or a
    file-size limit set on this process (GDAL reports some of these only as a failed SQLite call).
    """
    code = exc.errno if isinstance(exc, OSError) else None
    full = code in (errno.ENOSPC, errno.EDQUOT)
    if folder is not None and folder.exists():
        full = full or shutil.disk_usage(folder).free < 1 << 20
    if full:
        return " The disk is full (or a quota is reached): free space and run again."
    try:
        import resource

        limit = resource.getrlimit(resource.RLIMIT_FSIZE)[0]
    except (ImportError, OSError):  # pragma: no cover - Windows
        limit = None
    if code == errno.EFBIG or (limit is not None and limit != resource.RLIM_INFINITY):
        shown = f" of {limit:,} bytes" if limit not in (None, resource.RLIM_INFINITY) else ""
        return (
            f" A file-size limit{shown} applies to this process (ulimit -f) and the output may need "
            "more: raise the limit and run again."
        )
    if exc is not None and re.search(r"disk (I/O error|is full)|no space|quota", str(exc), re.I):
        return " The disk is full or failing: check it and run again."
    return ""


def _plain(value):
    """A parameter value as JSON can hold it (paths as text, a GeoDataFrame by description)."""
    if value is None or isinstance(value, (bool, int, float, str)):
        return value
    if isinstance(value, os.PathLike):
        return os.fspath(value)
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if _is_frame(value):
        return f"a GeoDataFrame of {len(value)} features"
    return str(value)


def _unset(value) -> bool:
    """A parameter left at nothing (not worth recording); layers in memory are never that."""
    return value is None or value is False or (isinstance(value, (list, tuple)) and not value)


def _crs_text(data, layer) -> str | None:
    try:
        if _is_frame(data):
            crs = data.crs
            return None if crs is None else crs.to_string()
        if isinstance(data, (str, os.PathLike)):
            return pyogrio.read_info(os.fspath(data), layer=layer).get("crs")
    except Exception:  # the record names what it can; reading errors were reported already
        return None
    return None


def provenance(script: str, values: dict, *, made_in: dict | None = None, notes: dict | None = None) -> dict:
    """How an output was made: script, parameters, input and its CRS, version and date.

    Parameters
    ----------
    script : str
        Script name, e.g. ``"group-spread"``.
    values : dict
        The script's validated parameter values.
    made_in : dict, optional
        ``{"chain": path, "step": name}`` when a chain's step made the output.
    notes : dict, optional
        {group: note} for the groups that could not be computed (their distances are empty).

    Returns
    -------
    dict
        A JSON-ready record, written into every output (see :func:`write_output`).

    Examples
    --------
    >>> record = provenance("group-spread", {"data": "homes.gpkg", "tolerance": 0.01})
    >>> record["script"], record["parameters"]["tolerance"], record["input"]
    ('group-spread', 0.01, 'homes.gpkg')
    >>> provenance("group-spread", {}, made_in={"chain": "steps.toml", "step": "spread"})["chain"]
    {'file': 'steps.toml', 'step': 'spread'}
    """
    from importlib.metadata import PackageNotFoundError, version

    try:
        made_by = f"pairspread {version('pairspread')}"
    except PackageNotFoundError:  # running from a source tree that is not installed
        made_by = "pairspread (version unknown)"
    skip = {"output", "overwrite", "quiet", "no_sidecar", "data"}
    data = values.get("data")
    record = {
        "made_by": made_by,
        "script": script,
        "created": datetime.datetime.now(datetime.UTC).isoformat(timespec="seconds"),
        "input": _plain(data),
        "layer": values.get("layer"),
        "input_crs": _crs_text(data, values.get("layer")),
        "tolerance": values.get("tolerance"),
        "weight": values.get("weight"),
        "parameters": {k: _plain(v) for k, v in values.items() if k not in skip and not _unset(v)},
    }
    if made_in:
        record["chain"] = {"file": _plain(made_in.get("chain")), "step": made_in.get("step")}
    if notes:
        record["notes"] = dict(notes)
    return record


def _one_line(record: dict) -> str:
    """The provenance record as the one line a GeoPackage table description holds."""
    layer = f", layer {record['layer']}" if record.get("layer") else ""
    chain = record.get("chain")
    step = f", step {chain['step']!r} of chain {chain['file']}" if chain else ""
    notes = f"; {len(record['notes'])} group(s) not computed" if record.get("notes") else ""
    return (
        f"{record['script']} by {record['made_by']} on {record['created']} from "
        f"{record['input']}{layer} (tolerance {record.get('tolerance')}){step}{notes}; details in gpkg_metadata"
    )


def _add_parquet_metadata(path: Path, record: dict) -> None:
    import pyarrow.parquet as pq

    table = pq.read_table(path)
    metadata = dict(table.schema.metadata or {})
    metadata[PROVENANCE_KEY.encode()] = json.dumps(record).encode()
    pq.write_table(table.replace_schema_metadata(metadata), path)


def _dbf_complete(dbf: Path) -> bool:
    """Whether a .dbf file holds every record its header declares.

    GDAL's Shapefile writer does not always report a short write of the .dbf part (a file-size
    limit, a full disk), and reading back the layer's info does not notice it either.
    """
    with open(dbf, "rb") as f:
        head = f.read(12)
    if len(head) < 12:
        return False
    count, header, record = struct.unpack("<IHH", head[4:12])  # dBASE header (common practice)
    return dbf.stat().st_size >= header + count * record


def _check_written(tmp: Path, kind: str, rows: int, fields: Sequence[str], layer_name: str, path: str) -> None:
    """Read back what was written: some writers ignore a failed write (a full disk) on close."""
    if kind in ("csv", "parquet"):
        return
    dbf = tmp.with_suffix(".dbf")
    if kind == "shp" and dbf.exists() and not _dbf_complete(dbf):
        raise OutputError(
            f"Writing {path!r} failed: its .dbf part (the attribute table) was cut short; nothing "
            "was written." + _disk_cause(tmp.parent)
        )
    try:
        info = pyogrio.read_info(tmp, layer=layer_name if kind == "gpkg" else None)
    except Exception as exc:
        raise OutputError(
            f"The output could not be read back ({_first_line(exc)}); nothing was written."
            + _disk_cause(tmp.parent, exc)
        ) from exc
    got = [str(f) for f in info["fields"]]
    if info["features"] != rows or len(got) != len(fields):
        missing = [f for f in fields if f.lower() not in {g.lower() for g in got}]
        what = f"{info['features']} of {rows} rows, {len(got)} of {len(fields)} fields"
        if missing:
            what += " (missing: " + ", ".join(repr(f) for f in missing[:5]) + ")"
        raise OutputError(
            f"Writing {path!r} failed: only part of it could be written ({what} read back); "
            "nothing was written." + _disk_cause(tmp.parent)
        )


def _move_into_place(parts: list[Path], folder: Path, scratch: Path) -> None:
    """Rename the new files over the old ones; if one rename fails, put the old ones back."""
    backups: list[tuple[Path, Path]] = []
    moved: list[Path] = []
    try:
        for part in parts:
            final = folder / part.name
            if final.exists():
                shutil.copymode(final, part)
                keep = scratch / (part.name + ".previous")
                # a second name for the old file, so the output's path is never empty: the
                # rename below replaces it in one step, and a failure can put it back
                try:
                    os.link(final, keep)
                except OSError:
                    shutil.copy2(final, keep)
                backups.append((keep, final))
            else:
                os.chmod(part, 0o666 & ~_umask())
            os.replace(part, final)
            moved.append(final)
    except BaseException:
        for final in moved:
            if not any(final == f for _, f in backups):
                final.unlink(missing_ok=True)
        for keep, final in backups:
            os.replace(keep, final)
        raise


def write_output(
    frame: pd.DataFrame,
    path: str,
    *,
    what: str = "table",
    layer_name: str = "",
    overwrite: bool = False,
    stdout_as: str | None = None,
    record: dict | None = None,
    sidecar: bool = True,
) -> str:
    """Write a table or layer atomically; returns a description of where it went.

    ``record`` (see :func:`provenance`) goes into the output: a GeoPackage table's description
    and a ``gpkg_metadata`` row, Parquet key-value metadata (key ``pairspread``), a GeoJSON
    ``description``, and for CSV and Shapefile a sidecar file named after the output plus
    ``.json`` (unless ``sidecar`` is False).

    A GeoPackage output gets the table or layer and keeps every other layer it had: it is
    written into a copy beside the file (a new file, if the old one holds only the table being
    replaced), synced to disk, which then replaces it in one rename. Other formats
    are written under a temporary name (a Shapefile's parts in a temporary folder) and renamed.
    A failure leaves no partial output and the previous file as it was.
    """
    batched = isinstance(frame, FrameBatches)  # a per-feature result made as it is written
    geometry_name = frame.geometry_name if batched else frame.geometry.name if _is_frame(frame) else None
    fields = [c for c in frame.columns if c != geometry_name]
    sidecar = sidecar and record is not None
    check_output(
        path, what=what, layer_name=layer_name, overwrite=overwrite, fields=fields, stdout_as=stdout_as,
        sidecar=sidecar,
    )  # fmt: skip
    kind = output_format(path, what)
    if kind == "stdout":
        from .pipe import write_stdout

        write_stdout(frame.frame() if batched else frame, stdout_format(what, stdout_as), layer_name)
        return "standard output"
    target = Path(path)
    with writer_lock(target):
        # checked again under the lock: a run that finished meanwhile may have added the table
        check_output(
            path, what=what, layer_name=layer_name, overwrite=overwrite, fields=fields, sidecar=sidecar
        )
        for _ in range(_FOREIGN_CHANGE_RETRIES):
            if _write_once(frame, path, target, kind, fields, layer_name, record, sidecar):
                break
        else:
            raise OutputError(
                f"{path!r} was changed by another program each time while this table was being "
                f"added ({_FOREIGN_CHANGE_RETRIES} tries); nothing was written and its changes are "
                "kept. Run again when the other program is done with it."
            )
    if kind == "gpkg":
        return f"{'table' if what == 'table' else 'layer'} {layer_name!r} in {path}"
    return str(path)


def _shapefile_renames(fields) -> dict:
    """Fields whose names a Shapefile shortens, and their new names (said in a warning)."""
    renamed = {k: v for k, v in shapefile_names(fields).items() if k != v}
    if renamed:
        warnings.warn(
            "Shapefile field names are at most 10 characters: "
            + ", ".join(f"{k} → {v}" for k, v in renamed.items()),
            UserWarning,
            stacklevel=3,
        )
    return renamed


def _write_batched(frame: FrameBatches, tmp, kind, renamed, layer_name, record, text) -> int:
    """A batched result written into ``tmp`` with the same provenance a frame gets."""
    options = {}
    if record is not None and kind == "gpkg":
        options = dict(layer_options={"DESCRIPTION": _one_line(record)}, layer_metadata={PROVENANCE_KEY: text})
    elif record is not None and kind == "geojson":
        options = dict(layer_options={"DESCRIPTION": text})
    return write_batches(
        frame, tmp, kind, layer_name=layer_name, options=options, renamed=renamed, record_text=text,
        provenance_key=PROVENANCE_KEY,
    )  # fmt: skip


#: a Shapefile holds one kind of geometry: the first kind present in this order is kept
_SHAPE_KINDS = (("polygon", ("Polygon", "MultiPolygon")), ("line", ("LineString", "MultiLineString")))


def _one_geometry_kind(frame):
    """``frame`` with the geometries a Shapefile cannot hold beside the others left empty.

    Group hulls mix polygons with points and lines (groups of one or two points, or on one
    line); a Shapefile holds one kind, so the others are written without geometry, with a
    warning.
    """
    if not _is_frame(frame):
        return frame
    types = frame.geom_type
    for word, kinds in _SHAPE_KINDS:
        if types.isin(kinds).any():
            others = types.notna() & ~types.isin(kinds)
            if others.any():
                warnings.warn(
                    f"A Shapefile holds one kind of geometry: {int(others.sum())} feature(s) whose "
                    f"shape is not a {word} are written without geometry; write a GeoPackage to keep them.",
                    UserWarning,
                    stacklevel=4,
                )
                frame = frame.copy()
                frame.loc[others.to_numpy(), frame.geometry.name] = None
            break
    return frame


def _write_once(
    frame, path: str, target: Path, kind: str, fields, layer_name: str, record: dict | None, sidecar: bool
) -> bool:
    """One copy-write-rename; False (and nothing written) if another program changed the target."""
    scratch = None
    try:
        scratch = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent))
        tmp = scratch / target.name
        before = _signature(target)
        text = None if record is None else json.dumps(record)
        rows = None if isinstance(frame, FrameBatches) else len(frame)
        # a file holding nothing but the table being replaced is written afresh: dropping
        # millions of old rows from a copy costs more than writing the new ones
        if kind == "gpkg" and before is not None and not _holds_only(target, layer_name):
            shutil.copyfile(target, tmp)
            shutil.copymode(target, tmp)
        if rows is None:  # batch after batch into the same temporary file
            renamed = _shapefile_renames(fields) if kind == "shp" else {}
            if renamed and record is not None:  # the sidecar keeps the mapping
                record = {**record, "shapefile_fields": renamed}
            with _unsynced_sqlite() if kind == "gpkg" else contextlib.nullcontext():
                rows = _write_batched(frame, tmp, kind, renamed, layer_name, record, text)
            if kind == "gpkg":
                _flush_to_disk(tmp)
        elif kind == "gpkg":
            extra = {}
            if record is not None:
                extra = dict(
                    layer_options={"DESCRIPTION": _one_line(record)}, layer_metadata={PROVENANCE_KEY: text}
                )
            with _unsynced_sqlite():
                # Arrow's columnar write: one WKB encoding of the geometry, no per-row Python
                pyogrio.write_dataframe(frame, tmp, layer=layer_name, driver="GPKG", use_arrow=True, **extra)
            _flush_to_disk(tmp)
        elif kind == "csv":
            tmp.write_text(csv_text(frame), encoding="utf-8")
        elif kind == "parquet":
            frame.to_parquet(tmp, index=False)
            if record is not None:
                _add_parquet_metadata(tmp, record)
        elif kind == "geojson":
            extra = {} if record is None else dict(layer_options={"DESCRIPTION": text})
            pyogrio.write_dataframe(frame, tmp, driver="GeoJSON", **extra)
        else:  # names are shortened here, at a character boundary, rather than by GDAL
            renamed = _shapefile_renames(fields)
            _warn_long_texts(frame, fields)
            if renamed and record is not None:  # the sidecar keeps the mapping
                record = {**record, "shapefile_fields": renamed}
            out = _one_geometry_kind(frame.rename(columns=renamed))
            pyogrio.write_dataframe(out, tmp, driver="ESRI Shapefile", encoding="UTF-8")
        _check_written(tmp, kind, rows, [str(f) for f in fields], layer_name, path)
        produced = [tmp] if kind != "shp" else [p for p in _shapefile_parts(tmp) if p.exists()]
        if record is not None and sidecar and kind in ("csv", "shp"):
            note = tmp.with_name(tmp.name + SIDECAR_SUFFIX)
            note.write_text(json.dumps(record, indent=2) + "\n", encoding="utf-8")
            produced.append(note)
        if kind == "gpkg" and _signature(target) != before:
            return False  # another program wrote into it meanwhile: our copy lacks its change
        interrupts.check()  # a Ctrl-C that a library swallowed still means: write nothing
        with _interrupts_deferred():  # renamed and recorded together, or neither
            _move_into_place(produced, target.parent, scratch)
            COMMITTED.append(str(path))
    except BaseException as exc:
        if isinstance(exc, (PairspreadError, KeyboardInterrupt, SystemExit)):
            raise  # ours (an input error met in a batch, too) says what went wrong already
        reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else _first_line(exc)
        raise OutputError(
            f"Writing {path!r} failed: {reason}; nothing was written."
            + _disk_cause(scratch, exc)
        ) from exc
    finally:
        if scratch is not None:
            shutil.rmtree(scratch, ignore_errors=True)
    return True
