"""Baselines on disk: versions, CURRENT, save and load.

Stage: model → **baselines** → scoring. A baseline is a directory ``<state_dir>/baselines/vNNNN/``:

    manifest.json   schema version, parameters, the fit report, the sha256 of the two other
                    files, and a checksum of all of that (a hand edit is refused)
    templates.json  the template miner
    model.npz       numbers only, one array per row of the storage table
                    (tracewatch/model/baseline.py ``ARRAYS`` plus the scorer's own rows)

``<state_dir>/baselines/CURRENT`` names the version in use. Saving and loading walk the same
table with the same checks (tracewatch/model/arrays.py). Loading never executes code (JSON, and
``.npy`` headers read before any data: no pickle) and is bounded: every file has a size limit,
every array's dtype and shape are checked against the table and the manifest before it is read,
every number is finite and within its range, every index within what it indexes, every manifest
and template field within its bounds (pydantic). A corrupt, edited, foreign or newer-schema
artifact is refused with one line. The fitted model itself (``Baseline``, ``fit_baseline``)
lives in tracewatch/model/baseline.py and is imported only when a baseline is loaded, so the
commands that never score do not load scikit-learn.
"""

from __future__ import annotations

import hashlib
import os
import re
import shutil
import stat
import struct
import tempfile
import time
import zipfile
import zlib
from pathlib import Path
from typing import TYPE_CHECKING, Annotated, Literal

import numpy as np
import orjson
from pydantic import BaseModel, ConfigDict, Field, ValidationError, model_validator

from . import __version__
from .errors import BaselineError, NoBaselineError, StateError
from .fs import atomic_write
from .model.arrays import ArrayError, check_shapes, check_values, decode_names, encode_names, name_dims
from .model.score import SCORERS, ScorerName, make_scorer

if TYPE_CHECKING:
    from .model.baseline import Baseline

SCHEMA_VERSION = 7  # 2: templates masked to <var>; 3: the template tree's settings renamed;
# 4: the manifest inside its checksum, the arrays of one storage table, each scorer's own arrays;
# 5: calibration_novelty (how often each source's normal sessions bring new templates), the
# baseline period's session shapes and their counts
# 6: key=value values and bracketed paths masked, bracketed tokens route as variables
# 7: a name with single digits in its words (ssh2, jk2_init()) stays a constant in a template
# and stands for every token of its digit shape
KIND = "tracewatch-baseline"
FILES = ("templates.json", "model.npz")
VERSION_NAME = re.compile(r"^v\d{4,9}$")
MAX_MANIFEST_BYTES = 16 << 20
MAX_TEMPLATES_BYTES = 256 << 20
MAX_MODEL_BYTES = 2 << 30  # model.npz, compressed and (the sum of its arrays) uncompressed
LIMITS = {"templates.json": MAX_TEMPLATES_BYTES, "model.npz": MAX_MODEL_BYTES}
MAX_NPY_HEADER = 10_000  # numpy's own default limit for a .npy header
MAX_TEMPLATES = 1_000_000
MAX_SOURCES = 10_000
MAX_TEXT = 65_536  # characters of a template token, a template, a representative step, a note
MAX_ITEMS = 100_000  # entries of a report list (curve, clusters, notes, a representative session)

_HEX64 = Annotated[str, Field(pattern=r"^[0-9a-f]{64}$")]
_Text = Annotated[str, Field(max_length=MAX_TEXT)]
_Count = Annotated[int, Field(ge=0, le=2**62)]
_Finite = Annotated[float, Field(allow_inf_nan=False)]
_SourceName = Annotated[str, Field(max_length=256, pattern=r"^(?:[A-Za-z0-9_.-]+|\*)$")]  # "*": pooled
_Steps = Annotated[list[_Text], Field(max_length=MAX_ITEMS)]


# -- what a manifest may hold ------------------------------------------------------------------------
class _Strict(BaseModel):  # strict: a number written as a string, or a float where a count goes, is refused
    model_config = ConfigDict(extra="forbid", strict=True)


class _CurvePoint(_Strict):
    k: int = Field(ge=1, le=MAX_ITEMS)
    inertia: _Finite = Field(ge=0)
    silhouette: float | None = Field(ge=-1, le=1)


class _ClusterInfo(_Strict):
    cluster: int = Field(ge=0, le=MAX_ITEMS)
    sessions: _Count
    spread: _Finite = Field(ge=0)
    representative: _Steps


class _Contamination(_Strict):
    sessions: _Count
    share: float = Field(ge=0, le=1)
    representative: _Steps


class _Incident(_Strict):  # a baseline session set aside as a probable incident
    session_key: _Text
    source: _SourceName
    reason: _Text


class _Threshold(_Strict):
    threshold: _Finite | None
    calibration_sessions: _Count
    new_template_share: float = Field(default=0.0, ge=0, le=1)


class _Gate(BaseModel):  # a refit gate: the fields `baselines show` prints are checked
    model_config = ConfigDict(extra="allow", strict=True)
    gate: _Text
    passed: bool
    detail: _Text


class _Refit(BaseModel):
    model_config = ConfigDict(extra="allow", strict=True)
    outcome: _Text
    based_on: _Text
    gates: list[_Gate] = Field(max_length=1000)


class FitReport(_Strict):
    """The fit report as ``tracewatch fit`` prints it and the manifest keeps it."""

    sessions: _Count
    train_sessions: _Count
    calibration_sessions: _Count
    distinct_sequences: _Count
    templates: _Count
    ngrams: _Count
    k: int = Field(ge=1, le=MAX_ITEMS)
    k_auto: bool
    streaming: bool
    knee: int = Field(ge=1, le=MAX_ITEMS)
    curve: list[_CurvePoint] = Field(max_length=MAX_ITEMS)
    notes: list[_Text] = Field(max_length=1000)
    clusters: list[_ClusterInfo] = Field(max_length=MAX_ITEMS)
    contamination: list[_Contamination] = Field(max_length=MAX_ITEMS)
    probable_incidents: list[_Incident] = Field(default_factory=list, max_length=100_000)
    thresholds: dict[_SourceName, _Threshold] = Field(max_length=MAX_SOURCES + 1)
    false_alarm_rate: float = Field(gt=0, lt=0.5)
    lowest_false_alarm_rate: float | None = Field(default=None, gt=0, le=1)
    scorer: str
    unseen_weight: _Finite = Field(ge=0)
    refit: _Refit | None = None
    # the [features] and [model] settings of the fit, as dotted keys (score warns when the config differs)
    settings: dict[Annotated[str, Field(max_length=64)], bool | int | _Finite | _Text] = Field(default_factory=dict,
                                                                                          max_length=100)


class Manifest(_Strict):
    schema_version: Literal[SCHEMA_VERSION]  # type: ignore[valid-type]
    kind: Literal["tracewatch-baseline"]
    version: str = Field(pattern=VERSION_NAME.pattern)
    created: str = Field(max_length=64)
    tracewatch: str = Field(max_length=64)
    files: dict[Literal["templates.json", "model.npz"], _HEX64]
    ngram_max: int = Field(ge=1, le=5)  # as [features] ngram_max
    false_alarm_rate: float = Field(gt=0, lt=0.5)  # as [model] false_alarm_rate
    scorer: ScorerName
    scorer_params: dict[str, int | float]
    sources: list[_SourceName] = Field(max_length=MAX_SOURCES + 1)
    report: FitReport
    checksum: _HEX64

    @model_validator(mode="after")
    def _consistent(self) -> "Manifest":
        if set(self.files) != set(FILES):
            raise ValueError(f"files must list {' and '.join(FILES)}")
        if len(set(self.sources)) != len(self.sources):
            raise ValueError("sources repeat a name")
        SCORERS[self.scorer].Params.model_validate(self.scorer_params)
        return self


class _TemplateEntry(_Strict):
    id: str = Field(min_length=1, max_length=64, pattern=r"^[0-9a-f]+$")
    template: _Text
    tokens: list[_Text] = Field(min_length=1, max_length=MAX_TEXT)
    path: list[_Text] = Field(max_length=64)
    count: _Count
    structured: bool


class _TemplatesFile(_Strict):
    """templates.json (TemplateTree.to_dict), with the bounds of the [templates] keys."""

    routing_tokens: int = Field(ge=1, le=6)
    join_share: float = Field(gt=0, le=1)
    max_branches: int = Field(ge=2, le=1_000_000)
    templates: list[_TemplateEntry] = Field(max_length=MAX_TEMPLATES)

    @model_validator(mode="after")
    def _unique(self) -> "_TemplatesFile":
        if len({t.id for t in self.templates}) != len(self.templates):
            raise ValueError("template ids repeat")
        return self


def _why(exc: Exception) -> str:
    """One line from a validation or parsing error."""
    if isinstance(exc, ValidationError):
        err = exc.errors()[0]
        where = ".".join(map(str, err["loc"]))
        return f"{where + ': ' if where else ''}{err['msg'].removeprefix('Value error, ')}"
    return str(exc).splitlines()[0] if str(exc) else type(exc).__name__


# -- versions ---------------------------------------------------------------------------------------
def baselines_dir(state_dir: Path) -> Path:
    return Path(state_dir) / "baselines"


def list_versions(state_dir: Path) -> list[str]:
    root = baselines_dir(state_dir)
    if not root.is_dir():
        return []
    return sorted(p.name for p in root.iterdir() if p.is_dir() and p.name.startswith("v") and p.name[1:].isdigit())


def current_version(state_dir: Path) -> str | None:
    pointer = baselines_dir(state_dir) / "CURRENT"
    try:
        name = _read(pointer, 64).decode("ascii", "replace").strip()
    except FileNotFoundError:
        return None
    except (OSError, ValueError) as exc:
        raise BaselineError(f"{pointer}: cannot read: {getattr(exc, 'strerror', None) or exc}") from exc
    if name and not VERSION_NAME.fullmatch(name):
        raise BaselineError(f"{pointer} names no baseline version ({name[:20]!r}); make one current with "
                            "'tracewatch baselines use VERSION'")
    return name or None


def set_current(state_dir: Path, version: str) -> None:
    if version not in list_versions(state_dir):
        raise BaselineError(f"no baseline version {version!r} in {baselines_dir(state_dir)}")
    atomic_write(baselines_dir(state_dir) / "CURRENT", (version + "\n").encode())


def check_writable(state_dir: Path) -> Path:
    """The baselines folder of ``state_dir``, created if need be, after proving a file can be
    written there: call it before reading and fitting, so a bad state_dir costs no work."""
    root = baselines_dir(state_dir)
    try:
        root.mkdir(parents=True, exist_ok=True)
        fd, probe = tempfile.mkstemp(dir=root, prefix=".write-check.")
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise StateError(f"{root}: cannot write baselines there ({exc.strerror or exc}); "
                         "check state_dir in the config") from exc
    return root


# -- saving -------------------------------------------------------------------------------------------
def _dims(ngram_max: int, n_templates: int, table, lists: dict[str, list[str]]) -> dict[str, int]:
    """The dimensions the manifest and templates.json fix before model.npz is read."""
    return {"G": ngram_max, "T": n_templates, **name_dims(table, lists)}


def _checksum(doc: dict) -> str:
    return hashlib.sha256(orjson.dumps(doc, option=orjson.OPT_SORT_KEYS)).hexdigest()


def save_baseline(b: Baseline, state_dir: Path, *, make_current: bool = True) -> Path:
    """Write the baseline as the next version; returns its directory. What is written passes
    the checks loading applies."""
    from .model.baseline import storage_table

    root = check_writable(state_dir)
    table = storage_table(b.scorer)
    templates = b.miner.to_dict()
    try:
        arrays, lists = encode_names(b.to_arrays(), table)
        dims = check_shapes({k: (np.asarray(v).dtype, np.shape(v)) for k, v in arrays.items()}, table,
                            _dims(b.vectorizer.ngram_max, len(templates["templates"]), table, lists))
        check_values(arrays, table, dims)
        _TemplatesFile.model_validate(templates)
        report = FitReport.model_validate(b.report).model_dump(mode="json")
    except (ArrayError, ValidationError) as exc:
        raise BaselineError(f"the fitted baseline cannot be saved ({_why(exc)}); fit it on other sessions") from exc
    existing = list_versions(state_dir)
    version = f"v{int(existing[-1][1:]) + 1 if existing else 1:04d}"
    tmp = Path(tempfile.mkdtemp(dir=root, prefix=f".{version}."))
    try:
        (tmp / "templates.json").write_bytes(orjson.dumps(templates))
        with open(tmp / "model.npz", "wb") as fh:
            np.savez_compressed(fh, **{a.name: arrays[a.name] for a in table})
        doc = {
            "schema_version": SCHEMA_VERSION, "kind": KIND, "version": version,
            "created": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()), "tracewatch": __version__,
            "files": {name: hashlib.sha256((tmp / name).read_bytes()).hexdigest() for name in FILES},
            "ngram_max": b.vectorizer.ngram_max, "false_alarm_rate": b.false_alarm_rate,
            "scorer": b.scorer.name, "scorer_params": b.scorer.get_params(), "sources": lists["sources"],
            "report": report,
        }
        doc["checksum"] = _checksum(doc)
        Manifest.model_validate(doc)
        (tmp / "manifest.json").write_bytes(orjson.dumps(doc, option=orjson.OPT_INDENT_2))
        for name in (*FILES, "manifest.json"):
            with open(tmp / name, "rb") as fh:
                os.fsync(fh.fileno())
        final = root / version
        os.rename(tmp, final)
    except OSError as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        raise StateError(f"{root}: cannot write baseline {version} ({exc.strerror or exc})") from exc
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    b.version = version
    if make_current:
        set_current(state_dir, version)
    return final


# -- loading ------------------------------------------------------------------------------------------
def load_baseline(state_dir: Path, version: str | None = None) -> Baseline:
    """Load a baseline version (default: the current one), verifying every file."""
    version = version or current_version(state_dir)
    if version is None:
        raise NoBaselineError(f"no baseline in {baselines_dir(state_dir)} yet; fit one first with "
                              "'tracewatch fit --config FILE INPUT...'")
    if not VERSION_NAME.fullmatch(version):
        raise BaselineError(f"no baseline version {version[:20]!r}: versions are named v0001, v0002, ...")
    return load_baseline_dir(baselines_dir(state_dir) / version)


def _open(path: Path, limit: int):
    """A regular file open for reading, refused beyond ``limit`` bytes before any is read. Opened
    without blocking, so a FIFO or a device in its place is refused instead of waited on."""
    fd = os.open(path, os.O_RDONLY | os.O_NONBLOCK)
    st = os.fstat(fd)
    if not stat.S_ISREG(st.st_mode) or st.st_size > limit:
        os.close(fd)
        raise ValueError("not a regular file" if not stat.S_ISREG(st.st_mode) else
                         f"{st.st_size} bytes, more than the {limit} a baseline file may have")
    return os.fdopen(fd, "rb")


def _read(path: Path, limit: int) -> bytes:
    with _open(path, limit) as fh:
        data = fh.read(limit + 1)
    if len(data) > limit:  # a file that grew, or one whose size says less than it holds
        raise ValueError(f"more than the {limit} bytes a baseline file may have")
    return data


def _sha256(path: Path, limit: int) -> str:
    digest = hashlib.sha256()
    with _open(path, limit) as fh:
        read = 0
        while chunk := fh.read(1 << 20):
            read += len(chunk)
            if read > limit:
                raise ValueError(f"more than the {limit} bytes a baseline file may have")
            digest.update(chunk)
    return digest.hexdigest()


def _manifest(path: Path) -> Manifest:
    where = f"{path}: manifest.json"
    try:
        doc = orjson.loads(_read(path / "manifest.json", MAX_MANIFEST_BYTES))
    except FileNotFoundError as exc:
        raise BaselineError(f"{path}: not a baseline (no manifest.json)") from exc
    except OSError as exc:
        raise BaselineError(f"{where}: cannot read: {exc.strerror or exc}") from exc
    except (orjson.JSONDecodeError, ValueError) as exc:
        raise BaselineError(f"{where} is corrupt or not a tracewatch baseline ({_why(exc)})") from exc
    if not isinstance(doc, dict) or doc.get("kind") != KIND:
        raise BaselineError(f"{where} is corrupt or not a tracewatch baseline (no kind {KIND!r})")
    schema = doc.get("schema_version")
    if schema != SCHEMA_VERSION:
        older = isinstance(schema, int) and schema < SCHEMA_VERSION
        raise BaselineError(f"{path}: baseline schema {schema!r} is not supported by this tracewatch (it reads "
                            f"schema {SCHEMA_VERSION}); " + ("it was written by an older tracewatch: fit a new "
                                                             "baseline with 'tracewatch fit'" if older else
                                                             "upgrade tracewatch or fit a new baseline"))
    claimed = doc.pop("checksum", None)
    if claimed != _checksum(doc):
        raise BaselineError(f"{where} does not match its checksum: it was edited or damaged (refit, or roll "
                            "back to another version with 'tracewatch baselines use')")
    try:
        return Manifest.model_validate({**doc, "checksum": claimed})
    except ValidationError as exc:
        raise BaselineError(f"{where} holds a value out of bounds ({_why(exc)})") from exc


def _templates(path: Path):
    from .templates import TemplateTree

    try:
        data = _TemplatesFile.model_validate_json(_read(path, MAX_TEMPLATES_BYTES))
    except (OSError, ValueError) as exc:  # ValidationError is a ValueError
        raise BaselineError(f"{path}: not usable templates ({_why(exc)})") from exc
    miner = TemplateTree.from_dict(data.model_dump())
    miner.freeze()
    return miner


def _npy_header(fp, info: zipfile.ZipInfo) -> tuple[np.dtype, tuple[int, ...]]:
    """dtype and shape of one .npy member, from its header alone; the member's size must be
    exactly that header plus the data it announces."""
    version = np.lib.format.read_magic(fp)
    if version == (1, 0):
        shape, fortran, dtype = np.lib.format.read_array_header_1_0(fp, max_header_size=MAX_NPY_HEADER)
    elif version == (2, 0):
        shape, fortran, dtype = np.lib.format.read_array_header_2_0(fp, max_header_size=MAX_NPY_HEADER)
    else:
        raise ValueError(f"{info.filename}: .npy format {version} is not one tracewatch writes")
    if fortran or dtype.hasobject:
        raise ValueError(f"{info.filename}: not a plain array of numbers")
    if info.file_size != fp.tell() + int(np.prod(shape, dtype=np.float64)) * dtype.itemsize:
        raise ValueError(f"{info.filename}: its size does not match its header")
    return dtype, tuple(shape)


def _arrays(path: Path, table, dims: dict[str, int]) -> dict[str, np.ndarray]:
    """The arrays of model.npz, checked against the table: every header first (dtype, shape,
    sizes: nothing is allocated for an array that does not fit), then the data, then the values."""
    if path.stat().st_size > MAX_MODEL_BYTES:
        raise ValueError(f"more than {MAX_MODEL_BYTES} bytes")
    with zipfile.ZipFile(path) as zf:
        infos = zf.infolist()
        names = [i.filename.removesuffix(".npy") for i in infos]
        if len(set(names)) != len(names) or not all(i.filename.endswith(".npy") for i in infos):
            raise ValueError("its members are not one .npy file per array")
        if any(i.flag_bits & 0x1 or i.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED)
               for i in infos):
            raise ValueError("a member is encrypted or compressed in a way tracewatch does not write")
        if sum(i.file_size for i in infos) > MAX_MODEL_BYTES:
            raise ValueError(f"its arrays hold more than {MAX_MODEL_BYTES} bytes")
        headers = {}
        for name, info in zip(names, infos):
            with zf.open(info) as fp:
                headers[name] = _npy_header(fp, info)
        dims = check_shapes(headers, table, dims)
        arrays = {}
        for name, info in zip(names, infos):
            dtype, shape = headers[name]
            arr = np.empty(shape, dtype=dtype)
            with zf.open(info) as fp:
                _npy_header(fp, info)
                got = fp.readinto(memoryview(arr.reshape(-1).view(np.uint8))) if arr.nbytes else 0
                if got != arr.nbytes or fp.read(1):  # reading to the end checks the CRC
                    raise ValueError(f"{info.filename}: truncated")
            arrays[name] = arr
    check_values(arrays, table, dims)
    return arrays


def load_baseline_dir(path: Path) -> Baseline:
    """Load the baseline in ``path``; BaselineError (one line) for anything unusable."""
    from .model.baseline import Baseline, storage_table

    path = Path(path)
    manifest = _manifest(path)
    for name in FILES:
        try:
            digest = _sha256(path / name, LIMITS[name])
        except (OSError, ValueError) as exc:
            raise BaselineError(f"{path}: cannot read {name}: {getattr(exc, 'strerror', None) or exc}") from exc
        if manifest.files[name] != digest:
            raise BaselineError(f"{path}: {name} does not match its checksum; the baseline is corrupt "
                                "(refit it, or roll back to another version)")
    miner = _templates(path / "templates.json")
    scorer = make_scorer(manifest.scorer, SCORERS[manifest.scorer].Params.model_validate(manifest.scorer_params))
    table = storage_table(scorer)
    lists = {"sources": manifest.sources}
    try:
        arrays = _arrays(path / "model.npz", table, _dims(manifest.ngram_max, len(miner.templates), table, lists))
        return Baseline.from_arrays(decode_names(arrays, table, lists), miner=miner, scorer=scorer,
                                    ngram_max=manifest.ngram_max, false_alarm_rate=manifest.false_alarm_rate,
                                    report=manifest.report.model_dump(mode="json"),
                                    version=manifest.version)
    except (ValueError, OSError, EOFError, zipfile.BadZipFile, zlib.error, struct.error, NotImplementedError) as exc:
        # ArrayError and numpy's header errors are ValueErrors
        raise BaselineError(f"{path}: model.npz is unreadable or does not fit its manifest ({_why(exc)}); "
                            "refit it") from exc
