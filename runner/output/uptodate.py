"""Is a results folder up to date? The check ``castgrid run`` makes before it computes anything.

A run records in the folder's :data:`RECORD` file (``rerun.json``) what its results depend on
and what it wrote. It is a file of its own, not a part of manifest.json, because much of it
belongs to this machine (the installed packages, the interpreter's build, castgrid's own
files): manifest.json stays what two machines or two releases can compare, and the record is
state to keep beside the results, not to commit with them. It holds:

* ``config``: the config file as the command line named it, its size and the SHA-256 of its
  bytes;
* ``inputs``: every other file the run read (dataset, attribute and recorded-forecast files,
  plugin modules), each with its size and SHA-256, hashed *before* the run read it, so that the
  record never describes newer bytes than the ones the run used;
* ``castgrid``, ``installed``, ``python``, ``environment``: castgrid's own files, the installed
  distributions, the interpreter and the environment variables that can change a number;
* ``complete``: the run did not stop early; ``failed``: its failed tasks; ``retry``: how many
  of them may pass if tried again (a timeout, a crash, an error of the machine: see
  :func:`may_pass`); the others fail the same way on the same inputs, as the forecast cache
  assumes when it keeps them;
* ``outputs``: the size and SHA-256 of every other file the run wrote in the folder (manifest,
  report and history included), taken once the folder was complete;
* ``refused``: why no rerun of this run may ever be taken as up to date (null when it may).

:func:`check_results` compares all of that with what is on disk now (and the manifest's
``versions`` and ``platform`` with this machine). It reads files and nothing else: this module
imports neither pandas, numpy, pyarrow nor pydantic, so that a rerun with nothing to do ends in
a fraction of the time those imports alone take. It never claims more than it checked: anything
it cannot read or does not recognise means "not up to date", and the full run follows.
"""

from __future__ import annotations

import hashlib
import json
import os
import platform
import re
import sys
from dataclasses import dataclass
from functools import cache
from pathlib import Path
from typing import Any

from runner import __version__
from runner.output.reader import MANIFEST
from runner.paths import config_relative

#: The file of a results folder in which a run records what the check compares.
RECORD = "rerun.json"
#: The text ``castgrid run`` printed on stdout (the leaderboard and selection lines), kept so
#: that a rerun with nothing to do prints it again without building the leaderboard.
TERMINAL = "leaderboard.txt"

#: Environment variables (by prefix) that can change what a run computes or draws: the BLAS
#: library's kernel choice and threads (``OPENBLAS_CORETYPE``, ``MKL_CBWR``, ...), numpy's
#: CPU dispatch (``NPY_DISABLE_CPU_FEATURES``) and matplotlib's configuration folder (its rc
#: file styles the plots). castgrid reads no variable of its own; the workers inherit these
#: (runner.execution.workers). ``PYTHONPATH`` only decides which files are imported, and those
#: are compared themselves: castgrid's own, the distributions on every ``sys.path`` folder,
#: and each plugin module, found again as the run would import it.
ENVIRONMENT_PREFIXES = ("OPENBLAS_", "GOTO", "MKL_", "BLIS_", "VECLIB_", "OMP_", "NPY_", "MPL")

_CHUNK = 1 << 20


# ------------------------------------------------------------------ what results depend on


def file_digest(path: str | Path) -> dict[str, Any]:
    """``{"size": bytes, "sha256": hex}`` of a file's bytes (size = the bytes hashed)."""
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        while block := fh.read(_CHUNK):
            h.update(block)
            size += len(block)
    return {"size": size, "sha256": h.hexdigest()}


@cache
def source_digest() -> str:
    """SHA-256 over the paths and bytes of castgrid's own package files.

    castgrid's version number does not move while castgrid itself is being worked on; its files
    do. Taken once per process, as early as the command line can (before the pipeline's
    modules are imported), so it describes the code this process runs.
    """
    root = Path(__file__).resolve().parent.parent
    names: list[str] = []
    for folder, dirs, files in os.walk(root):
        dirs[:] = [d for d in dirs if d != "__pycache__"]
        names.extend(os.path.join(folder, f) for f in files)
    h = hashlib.sha256()
    for name in sorted(names):
        with open(name, "rb") as fh:
            data = fh.read()
        rel = os.path.relpath(name, root).replace(os.sep, "/")
        h.update(f"{rel}\0{len(data)}\0".encode())
        h.update(data)
    return h.hexdigest()


def _distributions() -> tuple[tuple[str, str], ...]:
    """Every installed distribution along ``sys.path``, in import order: the name of its
    metadata folder (``numpy-2.1.0.dist-info``: name and version) and the SHA-256 of its
    RECORD (the digest of every file it installed; "" when it has none).

    Read from the folders, not with ``importlib.metadata``: that module alone takes longer to
    import than this whole check. RECORD tells two builds of one version apart (the same
    version from another index, with another BLAS), and is the same for the same build on
    every machine.
    """
    seen: set[str] = set()
    out: list[tuple[str, str]] = []
    for entry in sys.path:
        folder = os.path.realpath(entry or ".")
        if folder in seen:
            continue
        seen.add(folder)
        try:
            with os.scandir(folder) as it:
                names = sorted(e.name for e in it if e.name.endswith((".dist-info", ".egg-info")))
        except OSError:  # not a folder (a zip file), or gone
            continue
        for name in names:
            try:
                with open(os.path.join(folder, name, "RECORD"), "rb") as fh:
                    record = hashlib.sha256(fh.read()).hexdigest()
            except OSError:  # an .egg-info, or a file rather than a folder
                record = ""
            out.append((name, record))
    return tuple(out)


def installed_digest(listing: tuple[tuple[str, str], ...] | None = None) -> str:
    """SHA-256 of the installed distributions (names, versions, RECORD digests)."""
    found = _distributions() if listing is None else listing
    text = "\n".join(f"{name} {record}" for name, record in sorted(found))
    return hashlib.sha256(text.encode()).hexdigest()


def _normalised(name: str) -> str:
    return re.sub(r"[-_.]+", "_", name).lower()


def installed_versions(listing: tuple[tuple[str, str], ...] | None = None) -> dict[str, str]:
    """Version of each installed distribution by normalised name, the first found on
    ``sys.path`` (as an import finds it)."""
    out: dict[str, str] = {}
    for name, _ in _distributions() if listing is None else listing:
        stem = name.rsplit(".", 1)[0]
        dist, _, rest = stem.partition("-")
        out.setdefault(_normalised(dist), rest.split("-")[0])
    return out


def current_version(name: str, installed: dict[str, str] | None = None) -> str | None:
    """What ``manifest["versions"][name]`` would be now (None: not installed);
    ``installed`` is :func:`installed_versions`, when already known."""
    if name == "castgrid":
        return __version__
    if name == "python":
        return platform.python_version()
    return (installed_versions() if installed is None else installed).get(_normalised(name))


def environment() -> dict[str, str]:
    """The variables of :data:`ENVIRONMENT_PREFIXES` that are set, sorted."""
    return {k: os.environ[k] for k in sorted(os.environ) if k.startswith(ENVIRONMENT_PREFIXES)}


def cpu_model() -> str:
    """The CPU's model name (Linux /proc/cpuinfo), else what the platform module knows."""
    try:
        with open("/proc/cpuinfo", encoding="utf-8", errors="replace") as fh:
            for line in fh:
                key, _, value = line.partition(":")
                if key.strip() in ("model name", "Model", "cpu model"):
                    return value.strip()
    except OSError:
        pass
    return platform.processor() or "unknown"


#: Failure reasons that the same inputs give again: a series too short for a benchmark, a
#: forecast missing from a recorded file, a derived candidate whose components failed (those
#: failures are the run's too, and are judged on their own).
LASTING_FAILURES = ("too-short", "not-recorded", "component-missing", "component-failed")


def may_pass(reason: str, message: str) -> bool:
    """True when a task that failed with ``reason`` may succeed if run again.

    A model's ``error`` or ``invalid-output`` follows from the model and the data, unless the
    error is one of the machine (memory, files, imports): the rule by which the forecast cache
    keeps failures (:func:`runner.execution.cache.storable`). ``timeout``, ``crash``,
    ``not-run`` (the run stopped) and any reason not known here may pass.
    """
    from runner.execution.cache import STORED_FAILURES, TRANSIENT_ERRORS

    if reason in STORED_FAILURES:
        return message.startswith(TRANSIENT_ERRORS)
    return reason not in LASTING_FAILURES


# ------------------------------------------------------------------------ while a run reads


class Inputs:
    """What a run read, recorded as it reads it (:func:`runner.pipeline.prepare`).

    Each file is hashed before the run reads it: if it changes in between, the record holds
    the older bytes and the next check sees a change; the other order could record bytes the
    run never saw.

    >>> inputs = Inputs.refusing("the config was given as an object")
    >>> inputs.refused
    'the config was given as an object'
    """

    def __init__(self) -> None:
        self.config: dict[str, Any] | None = None
        self.files: list[dict[str, Any]] = []
        #: plugin module name -> the file it was found in (before it was imported)
        self.plugins: dict[str, str] = {}
        self.refused: str | None = None
        # taken now, before anything of the run is imported or read
        self.castgrid = source_digest()
        self.installed = installed_digest()
        self.environment = environment()

    @classmethod
    def of_config(cls, path: str | Path) -> Inputs:
        """Start a record with the config file as the command line names it."""
        inputs = cls()
        try:
            # as the run's messages name it (through Path: "./c.yaml" is "c.yaml")
            inputs.config = {"path": str(Path(path)), **file_digest(path)}
        except OSError:  # the run reports it when it reads the file
            inputs.refuse(f"{path}: the config cannot be read")
        return inputs

    @classmethod
    def refusing(cls, reason: str) -> Inputs:
        """A record whose run can never be taken as up to date, and why."""
        inputs = cls()
        inputs.refuse(reason)
        return inputs

    def refuse(self, reason: str) -> None:
        """No rerun of this run may be taken as up to date (the first reason is kept)."""
        if self.refused is None:
            self.refused = reason

    def add_file(self, role: str, path: object, config_folder: Path) -> None:
        """A file the config names (``role``: dataset, attributes, recorded), read later."""
        if not isinstance(path, str):  # the run reports the bad value
            self.refuse(f"{role} file {path!r} is not a path")
            return
        if any(f["path"] == path for f in self.files):
            return
        try:
            self.files.append({"role": role, "path": path,
                               **file_digest(config_relative(path, config_folder))})
        except OSError:
            self.refuse(f"{path}: cannot be read")

    def add_plugin(self, entry: str, config_folder: Path) -> None:
        """The file of a plugin entry's module, found (not imported) as the run will import it.

        Only a module that is one source file can be followed cheaply. A module inside a
        package, a compiled one, or one this process had already imported (its file may have
        changed since) refuses the check.
        """
        import importlib.util

        module = entry.partition(":")[0]
        if module in self.plugins:
            return
        if "." in module:
            self.refuse(f"plugin entry {entry}: a module inside a package (castgrid cannot tell "
                        "cheaply whether a package changed)")
            return
        if module in sys.modules:
            self.refuse(f"plugin module {module} was imported before this run started")
            return
        origin = _plugin_origin(module, config_folder, importlib.util.find_spec)
        if origin is None:
            self.refuse(f"plugin entry {entry}: its module is not one source file (.py)")
            return
        try:
            self.files.append({"role": "plugin", "path": origin, "module": module,
                               **file_digest(origin)})
        except OSError:
            self.refuse(f"plugin entry {entry}: {origin} cannot be read")
            return
        self.plugins[module] = origin

    def confirm_plugins(self) -> None:
        """After the plugins were imported: each came from the file hashed, and none brought
        in another module from its folder (that file was not hashed before it was read)."""
        folders = {os.path.dirname(p): m for m, p in self.plugins.items()}
        for module, origin in self.plugins.items():
            loaded = getattr(sys.modules.get(module), "__file__", None)
            if loaded is None or os.path.realpath(loaded) != origin:
                self.refuse(f"plugin module {module} was not imported from {origin}")
        for name, mod in list(sys.modules.items()):
            where = getattr(mod, "__file__", None)
            if not isinstance(where, str) or name in self.plugins:
                continue
            folder = os.path.dirname(os.path.realpath(where))
            if folder in folders:
                self.refuse(f"plugin module {folders[folder]} imports {name} from its folder "
                            "(castgrid follows a plugin's own file only)")

    def record(self, complete: bool, failed: int, retry: int,
               outputs: dict[str, dict[str, Any]]) -> dict[str, Any]:
        """What :data:`RECORD` holds: ``complete`` when the run did not stop early, ``failed``
        tasks of which ``retry`` may pass if run again, the ``outputs``' digests."""
        return {
            "config": self.config,
            "inputs": self.files,
            "castgrid": self.castgrid,
            "installed": self.installed,
            "python": sys.version,
            "environment": self.environment,
            "complete": complete,
            "failed": failed,
            "retry": retry,
            "outputs": outputs,
            "refused": self.refused,
        }


def _plugin_origin(module: str, config_folder: Path, find_spec: Any) -> str | None:
    """The real path of the source file ``import module`` would load, with the config's
    folder on the import path as :mod:`runner.forecasters.validation` puts it (appended), or
    None when it is not one ``.py`` file."""
    folder = str(Path(config_folder).resolve())
    added = folder not in sys.path
    if added:
        sys.path.append(folder)
    try:
        spec = find_spec(module)
    except Exception:  # an import hook of the environment may raise anything: not followed
        return None
    finally:
        if added:
            sys.path.remove(folder)
    origin = getattr(spec, "origin", None)
    if (spec is None or spec.submodule_search_locations is not None
            or not isinstance(origin, str) or not origin.endswith(".py")
            or not os.path.isfile(origin)):
        return None
    return os.path.realpath(origin)


def output_digests(folder: Path) -> dict[str, dict[str, Any]]:
    """Size and SHA-256 of every file in a results folder but :data:`RECORD`, by relative
    path.

    history.jsonl is one of them: the report's history plot is drawn from it and its last line
    is the run that wrote the folder, so an edited or removed history means the folder is no
    longer what that run wrote (the full run that follows appends its own line).
    """
    return {rel: file_digest(folder / rel) for rel in sorted(_files(folder)) if rel != RECORD}


def _files(folder: Path) -> list[str]:
    """Relative paths (``/``-separated) of the regular files under ``folder``; raises
    ValueError on anything else (a symbolic link, a device), which no run writes."""
    out: list[str] = []
    pending = [("", folder)]
    while pending:
        prefix, where = pending.pop()
        with os.scandir(where) as it:
            for e in it:
                rel = prefix + e.name
                if e.is_dir(follow_symlinks=False):
                    pending.append((rel + "/", Path(e.path)))
                elif e.is_file(follow_symlinks=False):
                    out.append(rel)
                else:
                    raise ValueError(f"{rel} is not a regular file")
    return out


# ------------------------------------------------------------------------------- the check


@dataclass(frozen=True)
class Verdict:
    """What :func:`check_results` found: the results folder it looked at, why it is not up to
    date (None when it is), and, when it is, what the run that wrote it printed."""

    folder: Path | None
    reason: str | None
    text: str = ""
    #: the run's failed tasks (each would fail the same way again): exit code 3 as then
    failed: int = 0

    @property
    def current(self) -> bool:
        """True when the folder holds what the run would write."""
        return self.reason is None


def check_results(config: str | Path, out: str | Path | None = None) -> Verdict:
    """Whether ``castgrid run CONFIG [--out OUT]`` would find nothing to do.

    Up to date means: the folder the run writes to holds a complete run (no failed task)
    of a config with the same bytes at the same path, on input files with the same bytes,
    with the same castgrid files, installed distributions, interpreter, platform and
    environment, and every file that run wrote is there, unchanged, with nothing else, and
    no write of the folder is under way or was left half done. Anything that cannot be read
    or recognised gives a reason instead: the full run follows and reports it.
    """
    folder: Path | None = Path(out) if out is not None else None
    try:
        raw = Path(config).read_bytes()
        if folder is None:
            folder = _default_folder(raw)
            if folder is None:
                return Verdict(None, "the config does not name its results folder plainly")
        reason, text, failed = _compare(Path(config), raw, folder, out is None)
    except Exception as exc:  # a check that cannot be made is a rerun to do, never an error
        return Verdict(folder, f"cannot check ({type(exc).__name__}: {exc})")
    if reason is not None:
        return Verdict(folder, reason)
    return Verdict(folder, None, text, failed)


def _default_folder(raw: bytes) -> Path | None:
    """results/<experiment>, or output.dir, as the config's YAML says (the manifest then
    confirms it: its canonical config came from the same bytes)."""
    import yaml

    data = yaml.load(raw, Loader=getattr(yaml, "CSafeLoader", yaml.SafeLoader))
    if not isinstance(data, dict):
        return None
    output = data.get("output") or {}
    return _folder_of(data.get("experiment"), output.get("dir") if isinstance(output, dict)
                      else None)


def _folder_of(experiment: object, out_dir: object) -> Path | None:
    """What :func:`runner.pipeline.output_dir` gives without an override."""
    if isinstance(out_dir, str) and out_dir:
        return Path(out_dir)
    if isinstance(experiment, str) and experiment:
        return Path("results") / experiment
    return None


def _compare(config: Path, raw: bytes, folder: Path, default_folder: bool
             ) -> tuple[str | None, str, int]:
    """(why the folder is not up to date or None, the text to print, the failed tasks)."""
    if folder.is_symlink() or not folder.is_dir():
        return f"{folder} is not a results folder", "", 0
    read: dict[str, Any] = {}
    for name in (MANIFEST, RECORD):
        try:
            read[name] = json.loads((folder / name).read_bytes())
        except FileNotFoundError:
            return f"{folder}/{name} is missing", "", 0
        except ValueError:
            return f"{folder}/{name} is not valid JSON", "", 0
        if not isinstance(read[name], dict):
            return f"{folder}/{name} is not a JSON object", "", 0
    manifest, rec = read[MANIFEST], read[RECORD]
    for check in (_run_state, _config_state, _machine_state, _leftovers, _input_state):
        reason = check(rec, manifest, config, raw, folder, default_folder)
        if reason is not None:
            return reason, "", 0
    outputs = rec.get("outputs")
    if not isinstance(outputs, dict) or TERMINAL not in outputs or MANIFEST not in outputs:
        return f"{folder}/{RECORD} lists no {TERMINAL} or {MANIFEST}", "", 0
    found = sorted(_files(folder))
    if found != sorted([*outputs, RECORD]):
        extra = sorted(set(found) - set(outputs) - {RECORD})
        gone = sorted(set(outputs) - set(found))
        return f"{folder}: files {'added' if extra else 'removed'}: {(extra or gone)[0]}", "", 0
    for rel, want in outputs.items():
        if file_digest(folder / rel) != want:
            return f"{folder}/{rel} changed since the run wrote it", "", 0
    return None, (folder / TERMINAL).read_bytes().decode("utf-8"), int(rec["failed"])


def _run_state(rec: dict[str, Any], manifest: dict[str, Any], *_: Any) -> str | None:
    if rec.get("refused") is not None:
        return f"the previous run cannot be checked: {rec['refused']}"
    if rec.get("complete") is not True:
        return "the previous run stopped early"
    failed = (manifest.get("tasks") or {}).get("failed")
    if not isinstance(failed, int) or rec.get("failed") != failed:
        return "the manifest's task counts do not match"
    if rec.get("retry") != 0:
        # a timeout, a crash or an error of the machine may pass now: the tasks are tried again
        return f"{rec.get('retry')} failed task(s) of the previous run may pass if run again"
    return None


def _config_state(rec: dict[str, Any], manifest: dict[str, Any], config: Path, raw: bytes,
                  folder: Path, default_folder: bool) -> str | None:
    was = rec.get("config") or {}
    # The path as written too: the run's notes and messages name the config by it.
    if was.get("path") != str(config):
        return f"the previous run read its config as {was.get('path')!r}, not {str(config)!r}"
    if was.get("size") != len(raw) or was.get("sha256") != hashlib.sha256(raw).hexdigest():
        return f"{config} changed"
    if default_folder:
        cfg = manifest.get("config") or {}
        output = cfg.get("output") or {}
        if _folder_of(cfg.get("experiment"), output.get("dir")) != folder:
            return f"{folder} holds the results of another experiment"
    return None


def _machine_state(rec: dict[str, Any], manifest: dict[str, Any], *_: Any) -> str | None:
    versions = manifest.get("versions")
    if not isinstance(versions, dict) or not versions:
        return "the manifest records no versions"
    listing = _distributions()
    installed = installed_versions(listing)
    for name, was in sorted(versions.items()):
        now = current_version(name, installed)
        if now != was:
            return f"{name} {was} then, {now or 'not installed'} now"
    if rec.get("python") != sys.version:
        return "another Python interpreter"
    if rec.get("castgrid") != source_digest():
        return "castgrid's own files changed"
    if rec.get("installed") != installed_digest(listing):
        return "installed distributions changed"
    if rec.get("environment") != environment():
        return "environment variables that change results differ"
    # The BLAS kernel the manifest records (platform.blas) is not compared: reading it means
    # loading scipy's BLAS. It is chosen by the BLAS library (part of the installed
    # distributions above), the CPU (below) and the OPENBLAS_/MKL_ variables (environment):
    # with those unchanged it is the same kernel.
    was = manifest.get("platform") or {}
    now = {"machine": platform.machine(), "system": platform.system(), "cpu": cpu_model()}
    for key, value in now.items():
        if was.get(key) != value:
            return f"another platform ({key}: {was.get(key)!r} then, {value!r} now)"
    return None


def _leftovers(rec: dict[str, Any], manifest: dict[str, Any], config: Path, raw: bytes,
               folder: Path, default_folder: bool) -> str | None:
    # A run writing the folder now, or one killed while writing it (runner.output.writer):
    # the full run waits for neither, and sweeps what a killed one left.
    prefixes = (f".{folder.name}.tmp-", f".{folder.name}.old-")
    parent = folder.parent
    with os.scandir(parent) as it:
        for e in it:
            if e.name.startswith(prefixes):
                return f"{parent / e.name} is left from a run writing {folder}"
    return None


def _input_state(rec: dict[str, Any], manifest: dict[str, Any], config: Path, raw: bytes,
                 folder: Path, default_folder: bool) -> str | None:
    import importlib.util

    files = rec.get("inputs")
    if not isinstance(files, list):
        return f"{RECORD} records no input files"
    base = config.parent
    for f in files:
        path = f["path"]
        if f.get("role") == "plugin":
            # the file the entry would import now (PYTHONPATH and the working folder decide)
            now = _plugin_origin(f["module"], base, importlib.util.find_spec)
            if now != path:
                return f"plugin module {f['module']} is now found at {now}, not {path}"
            where = Path(path)
        else:
            where = config_relative(path, base)
        try:
            digest = file_digest(where)
        except OSError:
            return f"{path} cannot be read"
        if digest != {"size": f.get("size"), "sha256": f.get("sha256")}:
            return f"{path} changed"
    return None
