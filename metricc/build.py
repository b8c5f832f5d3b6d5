"""Stage 5: sources -> cached, compiled kernels.

The cache (``$METRICC_CACHE_DIR``, else ``$XDG_CACHE_HOME/metricc``, else ``~/.cache/metricc``)
holds one folder per *spec key*: sha256 of the spec's canonical content, the metricc version
and the build options. A warm load finds that folder from the spec text alone, without
importing sympy. The folder holds the generated sources, ``manifest.json`` (what the runtime
needs to know about the kernels) and, once compiled, the cffi extension named
``_metricc_<hash16>`` after the *binary key*: sha256 of the extension's C source, the compiler
command, the Python ABI tag and the metricc version.

Publishing is atomic: a folder is built under a temporary name inside the cache and renamed
into place; a file is written to a temporary name and ``os.replace``d. A lock file only saves
duplicate work when several processes build the same spec at once; a half-written entry is
never visible.

Damage is detected, not trusted: the manifest records the sha256 of every generated file and
of the compiled binary. The binary is checked before it is loaded (a truncated shared object
would otherwise be mapped and fault with SIGBUS, garbage or another spec's binary would fail
to import on every load); sources are checked before they are compiled or imported. A damaged
entry is rebuilt. Nothing in the cache is ever truncated or rewritten in place, so a process
that already has a binary mapped keeps valid pages while it is replaced. Temporary folders of
a builder that was killed are removed by the next builder of the same entry (it holds the
lock, so none of them can still be in use) and, for other entries, once they are an hour old.
"""
from __future__ import annotations

import contextlib
import hashlib
import importlib.machinery
import importlib.util
import json
import os
import shlex
import shutil
import subprocess
import sys
import sysconfig
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

from ._version import __version__
from .errors import BuildError
from .spec import Spec

MANIFEST = "manifest.json"
# 2: per-file sha256 ("sources") and the binary's sha256
MANIFEST_FORMAT = 2
# Where a verified binary's file identity is remembered (see _binary_ok).
STAMP = ".verified.json"
# Temporary folders in the cache root older than this belong to a dead builder.
STALE_SECONDS = 3600
# The integrator's translation unit: -O2 compiles it in half the time of -O3, and its loops
# over the lanes (fixed trip counts) vectorise all the same.
INTEGRATOR_FLAGS = ["-O2"]
WRAPPER_FLAGS = ["-O1"]
COMPILE_FLAGS = ("-O3", "-std=c99", "-fPIC", "-fno-semantic-interposition", "-fno-math-errno",
                 "-ffp-contract=off")


def cache_root() -> Path:
    """The cache folder (created on first use)."""
    env = os.environ.get("METRICC_CACHE_DIR")
    if env:
        return Path(env)
    xdg = os.environ.get("XDG_CACHE_HOME")
    base = Path(xdg) if xdg else Path.home() / ".cache"
    return base / "metricc"


_FINGERPRINT: list[str] = []


def generator_fingerprint() -> str:
    """sha256 of metricc's own generator code and templates (so a changed generator never
    serves stale kernels, even without a version bump). Read once per process."""
    if not _FINGERPRINT:
        from .resources import template_dir
        h = hashlib.sha256()
        here = Path(__file__).resolve().parent
        for path in sorted(here.glob("*.py")) + sorted(template_dir().glob("*.j2")):
            h.update(path.name.encode())
            h.update(path.read_bytes())
        _FINGERPRINT.append(h.hexdigest())
    return _FINGERPRINT[0]


def spec_key(spec: Spec, options: dict | None = None) -> str:
    """sha256 over what determines the generated sources: spec content, version, generator
    code, options."""
    payload = json.dumps({"spec": spec.canonical, "version": __version__,
                          "generator": generator_fingerprint(),
                          "options": options or {}}, sort_keys=True)
    return hashlib.sha256(payload.encode()).hexdigest()


def atomic_write(path: Path, data: str | bytes) -> None:
    """Write a file so that readers see either the old or the whole new content."""
    path = Path(path)
    mode = "wb" if isinstance(data, bytes) else "w"
    try:
        perms = path.stat().st_mode & 0o777
    except OSError:
        perms = 0o644
    fd, tmp = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".tmp")
    try:
        os.chmod(tmp, perms)
        with os.fdopen(fd, mode, **({} if isinstance(data, bytes) else {"encoding": "utf-8",
                                                                        "newline": "\n"})) as f:
            f.write(data)
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise


@contextlib.contextmanager
def _lock(path: Path):
    try:
        import fcntl
    except ImportError:  # pragma: no cover - not POSIX: no lock, publication stays atomic
        yield
        return
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "a+") as f:
        fcntl.flock(f, fcntl.LOCK_EX)
        try:
            yield
        finally:
            fcntl.flock(f, fcntl.LOCK_UN)


@dataclass(frozen=True)
class CacheEntry:
    """One spec's folder in the cache and its manifest.

    origin: (spec, options) for entries of the cache proper, so a damaged entry can be
    regenerated; None for folders made from files given by the user (``verify --dir``), whose
    sources are taken as they are."""
    directory: Path
    manifest: dict
    origin: tuple | None = field(default=None, compare=False, repr=False)

    @property
    def has_binary(self) -> bool:
        b = self.manifest.get("binary")
        return bool(b) and (self.directory / b["file"]).is_file()

    def path(self, filename: str) -> Path:
        return self.directory / filename


def _read_manifest(directory: Path) -> dict | None:
    try:
        with open(directory / MANIFEST, encoding="utf-8") as f:
            m = json.load(f)
    except (OSError, ValueError):
        return None
    if m.get("format") != MANIFEST_FORMAT or m.get("metricc_version") != __version__:
        return None
    return m


def lookup(spec: Spec, options: dict | None = None) -> CacheEntry | None:
    """The cache entry of a spec if it exists (no sympy, no compiler)."""
    directory = cache_root() / spec_key(spec, options)[:32]
    m = _read_manifest(directory)
    return CacheEntry(directory, m, (spec, options)) if m is not None else None


def file_sha256(path: Path) -> str:
    with open(path, "rb") as f:
        return hashlib.file_digest(f, "sha256").hexdigest()


def damaged_sources(entry: CacheEntry, names) -> list[str]:
    """Those of the generated files ``names`` that are missing or differ from the sha256
    recorded when the entry was published (none for entries without an origin)."""
    recorded = entry.manifest.get("sources") or {}
    if entry.origin is None:
        return []
    bad = []
    for name in names:
        try:
            ok = file_sha256(entry.path(name)) == recorded.get(name)
        except OSError:
            ok = False
        if not ok:
            bad.append(name)
    return bad


def _discard(directory: Path) -> None:
    """Remove a cache folder: renamed away first (atomic for readers), then deleted. Files are
    unlinked, never truncated, so a process that has a binary of it mapped is unaffected."""
    trash = directory.parent / f".trash-{directory.name}-{os.getpid()}-{time.monotonic_ns()}"
    try:
        os.rename(directory, trash)
    except OSError:
        return
    shutil.rmtree(trash, ignore_errors=True)


def _remove_stale(root: Path, own_prefix: str) -> None:
    """Remove temporary folders of dead builders in the cache root: those named
    ``own_prefix*`` (the caller holds the lock they were made under) at any age, other
    ``.build-*``/``.trash-*`` folders once older than STALE_SECONDS."""
    now = time.time()
    try:
        items = list(os.scandir(root))
    except OSError:
        return
    for item in items:
        if not item.name.startswith((".build-", ".trash-")):
            continue
        try:
            if not item.is_dir(follow_symlinks=False):
                continue
            if item.name.startswith(own_prefix) or now - item.stat().st_mtime > STALE_SECONDS:
                shutil.rmtree(item.path, ignore_errors=True)
        except OSError:
            continue


def regenerate(entry: CacheEntry) -> CacheEntry:
    """Replace a damaged cache entry by freshly generated sources (the binary is compiled
    again on demand). Raises BuildError for entries without an origin."""
    if entry.origin is None:
        raise BuildError(f"generated files in {entry.directory} are damaged")
    spec, options = entry.origin
    with _lock(entry.directory.parent / f".{entry.directory.name}.lock"):
        m = _read_manifest(entry.directory)
        fresh = CacheEntry(entry.directory, m, entry.origin) if m is not None else None
        if fresh is None or damaged_sources(fresh, fresh.manifest.get("sources") or ["?"]):
            _discard(entry.directory)
    return ensure_sources(spec, options)


def ensure_sources(spec: Spec, options: dict | None = None) -> CacheEntry:
    """The cache entry of a spec, generating its sources (sympy) on a miss."""
    entry = lookup(spec, options)
    if entry is not None:
        return entry
    root = cache_root()
    root.mkdir(parents=True, exist_ok=True)
    key = spec_key(spec, options)
    directory = root / key[:32]
    with _lock(root / f".{key[:32]}.lock"):
        entry = lookup(spec, options)
        if entry is not None:
            return entry
        _remove_stale(root, f".build-{key[:32]}-")
        from .pipeline import generate  # imports sympy: only on a miss
        result = generate(spec, extra_kernels=tuple((options or {}).get("kernels", ())))
        tmp = Path(tempfile.mkdtemp(dir=root, prefix=f".build-{key[:32]}-"))
        try:
            for name, text in result.sources.files.items():
                atomic_write(tmp / name, text)
            manifest = manifest_of(result)
            manifest["sources"] = {name: hashlib.sha256(text.encode("utf-8")).hexdigest()
                                   for name, text in result.sources.files.items()}
            manifest["options"] = dict(options or {})
            atomic_write(tmp / MANIFEST, json.dumps(manifest, indent=1, sort_keys=True))
            if directory.exists():  # a stale entry (other version or format): replace it
                shutil.rmtree(directory, ignore_errors=True)
            try:
                os.rename(tmp, directory)
            except OSError:
                if _read_manifest(directory) is None:
                    raise
        finally:
            shutil.rmtree(tmp, ignore_errors=True)
    entry = lookup(spec, options)
    if entry is None:  # pragma: no cover
        raise BuildError(f"cache entry {directory} could not be published")
    return entry


def manifest_of(result) -> dict:
    """What the runtime needs about a KernelSet, as JSON-ready data."""
    ks = result.kernels
    return {
        "format": MANIFEST_FORMAT,
        "metricc_version": __version__,
        "name": ks.name,
        "summary": ks.summary,
        "spec_sha256": ks.spec_sha256,
        "coordinates": list(ks.coordinates),
        "parameters": [[p, v] for p, v in ks.parameters],
        "kernels": {k.name: _kernel_entry(k) for k in ks.kernels},
        "ignorable": list(ks.ignorable),
        "domain": list(ks.domain),
        "events": list(ks.events),
        "invariants": list(ks.invariants),
        "groups": list(ks.groups),
        "nan_where": list(ks.nan_where),
        "periodic": list(ks.periodic),
        "periods": {c: value for c, value, _ in ks.periods},
        "signature": list(ks.signature),
        "inverse_strategy": ks.inverse_strategy,
        "inverse_blocks": list(ks.inverse_blocks),
        "sampling": [list(s) for s in result.spec.sampling],
        "files": sorted(result.sources.files),
        "cdef": result.cdef,
        "derive_seconds": round(result.seconds, 3),
        "binary": None,
    }


# -- compiling -------------------------------------------------------------------------------
def compiler_command() -> list[str]:
    """The C compiler as argv: $CC, else the compiler Python was built with, else cc."""
    cc = os.environ.get("CC") or sysconfig.get_config_var("CC") or "cc"
    return shlex.split(cc)


_OPENMP_TEST = """#include <omp.h>
int main(void) { int n = 0;
#pragma omp parallel reduction(+:n)
n += 1;
return n > 0 && omp_get_max_threads() > 0 ? 0 : 1; }
"""


def openmp_flags(cc: list[str]) -> list[str]:
    """["-fopenmp"] if the compiler builds and runs an OpenMP program, else [].

    Detected once per compiler and remembered in the cache folder.
    """
    root = cache_root()
    key = hashlib.sha256(json.dumps(cc).encode()).hexdigest()[:16]
    memo = root / f"openmp-{key}.json"
    try:
        return json.loads(memo.read_text())["flags"]
    except (OSError, ValueError, KeyError):
        pass
    flags: list[str] = []
    with tempfile.TemporaryDirectory() as tmp:
        src = Path(tmp) / "omp.c"
        src.write_text(_OPENMP_TEST)
        exe = Path(tmp) / "omp"
        try:
            proc = subprocess.run(cc + ["-fopenmp", str(src), "-o", str(exe)],
                                  capture_output=True, timeout=120)
            if proc.returncode == 0 and subprocess.run([str(exe)], capture_output=True,
                                                       timeout=60).returncode == 0:
                flags = ["-fopenmp"]
        except (OSError, subprocess.TimeoutExpired):
            flags = []
    try:
        root.mkdir(parents=True, exist_ok=True)
        atomic_write(memo, json.dumps({"compiler": cc, "flags": flags}))
    except OSError:
        pass
    return flags


def vector_math_flags(name: str) -> list[str]:
    """Compiler flags of a vector-math build (vectorised *_soa loops with glibc's libmvec).

    Only values of sin, cos, exp, log and pow change (to libmvec's, within 4 ulp); no
    reassociation or fast-math is involved.
    """
    if sys.platform != "linux" or "x86_64" not in (sysconfig.get_platform() or ""):
        raise BuildError("vector math needs glibc's libmvec on x86-64 Linux")
    return [f"-D{name.upper()}_VECTOR_MATH", "-O3", "-fopenmp-simd", "-fno-builtin-sin",
            "-fno-builtin-cos"]


def _link_flags() -> list[str]:
    if sys.platform == "darwin":
        return ["-bundle", "-undefined", "dynamic_lookup"]
    return ["-shared"]


def extension_source(entry: CacheEntry, module_name: str) -> str:
    """The C source of the cffi extension module (kernels inlined)."""
    import cffi
    name = entry.manifest["name"]
    header = entry.path(f"{name}.h").read_text(encoding="utf-8")
    body = entry.path(f"{name}.c").read_text(encoding="utf-8")
    body = body.replace(f'#include "{name}.h"', "/* header inlined below */\n" + header, 1)
    from cffi.recompiler import recompile
    ffi = cffi.FFI()
    ffi.cdef(entry.manifest["cdef"])
    with tempfile.TemporaryDirectory() as tmp:
        out = Path(tmp) / "module.c"
        # recompile() without calling the compiler is what FFI.emit_c_code does, minus its
        # "generating ..." message on stdout.
        recompile(ffi, module_name, body, c_file=str(out), call_c_compiler=False,
                  uses_ffiplatform=False, compiler_verbose=False)
        return out.read_text(encoding="utf-8")


def _stat_identity(path: Path) -> list[int]:
    """What changes whenever a file's bytes may have: ctime cannot be set back from user
    space, so any write, truncation or replacement shows."""
    st = os.stat(path)
    return [st.st_dev, st.st_ino, st.st_size, st.st_mtime_ns, st.st_ctime_ns]


_VERIFIED: dict = {}


def _binary_ok(entry: CacheEntry) -> bool:
    """Whether the entry's binary is the one that was published (sha256 from the manifest).

    Hashing costs about a millisecond per 200 KB, a good part of a warm load, so a verified
    file's identity (device, inode, size, mtime, ctime) is remembered next to it and in the
    process; the file is hashed again only when that identity changes."""
    b = entry.manifest.get("binary") or {}
    path = entry.directory / b.get("file", "?")
    try:
        ident = _stat_identity(path)
    except OSError:
        return False
    want = b.get("sha256")
    if not want:
        return False
    if _VERIFIED.get(str(path)) == (ident, want):
        return True
    stamp = entry.directory / STAMP
    try:
        if json.loads(stamp.read_text()) == {"identity": ident, "sha256": want}:
            _VERIFIED[str(path)] = (ident, want)
            return True
    except (OSError, ValueError):
        pass
    try:
        ok = file_sha256(path) == want
    except OSError:
        return False
    if ok:
        _VERIFIED[str(path)] = (ident, want)
        with contextlib.suppress(OSError):  # a read-only shared cache just hashes every time
            atomic_write(stamp, json.dumps({"identity": ident, "sha256": want}))
    return ok


def ensure_binary(entry: CacheEntry) -> CacheEntry:
    """Compile the entry's extension if it has none yet, or if its binary is damaged (then
    also its sources are regenerated if they are damaged); raises BuildError on failure."""
    if entry.has_binary and _binary_ok(entry):
        return entry
    name = entry.manifest["name"]
    if damaged_sources(entry, [f"{name}.h", f"{name}.c"]):
        entry = regenerate(entry)
    with _lock(entry.directory.parent / f".{entry.directory.name}.lock"):
        m = _read_manifest(entry.directory)
        if m is None:
            raise BuildError(f"cache entry {entry.directory} disappeared while building")
        current = CacheEntry(entry.directory, m, entry.origin)
        if current.has_binary and _binary_ok(current):
            return current
        # We hold the entry's lock: every temporary left for it is a dead builder's.
        _remove_stale(entry.directory.parent, f".build-{entry.directory.name}-")
        for item in entry.directory.iterdir():
            if item.name.startswith(".cc-") and item.is_dir():
                shutil.rmtree(item, ignore_errors=True)
            elif item.name.startswith(".") and item.name.endswith(".tmp"):
                with contextlib.suppress(OSError):
                    item.unlink()
        if m.get("binary"):  # damaged: unlink (never truncate a file someone may have mapped)
            with contextlib.suppress(OSError):
                (entry.directory / m["binary"]["file"]).unlink()
            m = dict(m, binary=None)
            atomic_write(entry.directory / MANIFEST, json.dumps(m, indent=1, sort_keys=True))
        entry = CacheEntry(entry.directory, m, entry.origin)
        cc = compiler_command()
        if shutil.which(cc[0]) is None:
            raise BuildError(f"no C compiler: {cc[0]!r} not found (set CC, or use "
                             "backend='numpy')")
        ext = sysconfig.get_config_var("EXT_SUFFIX") or ".so"
        include = sysconfig.get_paths()["include"]
        probe_name = "_metricc_probe"
        source_for_key = extension_source(entry, probe_name)
        omp = openmp_flags(cc)
        extra = vector_math_flags(entry.manifest["name"]) \
            if entry.manifest.get("options", {}).get("vector_math") else []
        omp = omp + extra
        name = entry.manifest["name"]
        kernels_part, integrator_part = (f"-D{name.upper()}_SKIP_INTEGRATOR",
                                         f"-D{name.upper()}_SKIP_KERNELS")
        units = kernel_units(entry.manifest)
        argv_for_key = cc + list(COMPILE_FLAGS) + omp + _link_flags() + [
            kernels_part, integrator_part] + INTEGRATOR_FLAGS + WRAPPER_FLAGS + [units]
        bkey = hashlib.sha256(json.dumps([source_for_key, argv_for_key, ext, __version__])
                              .encode()).hexdigest()
        module_name = f"_metricc_{bkey[:16]}"
        source = source_for_key.replace(probe_name, module_name)
        filename = module_name + ext
        with tempfile.TemporaryDirectory(dir=entry.directory, prefix=".cc-") as tmp:
            c_file = Path(tmp) / f"{module_name}.c"
            c_file.write_text(source, encoding="utf-8")
            out = Path(tmp) / filename
            # Translation units compiled side by side, then one link: the extension
            # module's Python wrappers (their speed hardly matters: -O1), the kernels (one
            # unit per optional group, see kernel_units), and the spec's integrator.
            compile_base = cc + list(COMPILE_FLAGS) + omp + ["-I", include, "-c"]
            spec_c = str(entry.path(f"{name}.c"))
            parts = ["wrappers", *(u for u, _ in units), "integrator"]
            objects = [Path(tmp) / f"{part}.o" for part in parts]
            jobs = [compile_base + WRAPPER_FLAGS + [kernels_part, integrator_part, str(c_file),
                                                   "-o", str(objects[0])]]
            jobs += [compile_base + flags + ["-I", str(entry.directory), spec_c, "-o", str(o)]
                     for (_, flags), o in zip(units, objects[1:])]
            jobs.append(compile_base + INTEGRATOR_FLAGS + ["-I", str(entry.directory),
                                                           integrator_part, spec_c, "-o",
                                                           str(objects[-1])])
            link = cc + omp + _link_flags() + [str(o) for o in objects] + \
                ["-o", str(out)] + (["-lmvec"] if extra else []) + ["-lm"]
            t0 = time.perf_counter()
            unit_seconds = _run_compiler(jobs)
            _run_compiler([link])
            if not out.is_file():
                raise BuildError(f"C compiler produced no {filename}")
            digest = file_sha256(out)
            os.replace(out, entry.directory / filename)
            with contextlib.suppress(OSError):  # the first load need not hash it again
                atomic_write(entry.directory / STAMP, json.dumps(
                    {"identity": _stat_identity(entry.directory / filename), "sha256": digest}))
        m = dict(entry.manifest)
        m["binary"] = {"module": module_name, "file": filename, "key": bkey,
                       "compile_seconds": round(time.perf_counter() - t0, 3),
                       "compiler": " ".join(cc), "openmp": bool(omp), "sha256": digest,
                       "unit_seconds": dict(zip(parts, unit_seconds))}
        atomic_write(entry.directory / MANIFEST, json.dumps(m, indent=1, sort_keys=True))
        return CacheEntry(entry.directory, m, entry.origin)


# Optimisation of an optional group's unit by the size of its largest kernel (emitted
# operations). GCC's register allocation grows much faster than linearly with the size of
# one straight-line function. Measured on a dense 8-D metric (gcc 12, x86-64): its Riemann
# tensor (29,000 operations) compiles in 35.5 s of CPU at -O1 and 0.9 s at -O0, and runs at
# 9.4 and 14.5 us per call; Ricci (13,000) takes 5.2 s at -O1. The NumPy-free kernels a
# user integrates with (core) keep -O3.
GROUP_OPT = ((20000, ["-O0"]), (4000, ["-O1"]), (0, ["-O2"]))
CARRY_O3_OPS = 4000
COMPILE_TIMEOUT = 600


def _kernel_entry(k) -> dict:
    """A kernel's manifest entry: its input, output shape and operation counts; a
    directional kernel (metricc.tangent) also its direction's size and output shape."""
    entry = {"input": k.input_name, "input_size": len(k.input_symbols),
             "output_shape": list(k.output_shape), "ops_before": k.ops_before,
             "ops_after": k.ops_after}
    if k.directional:
        entry["direction_size"] = len(k.direction_symbols)
        entry["direction_output_shape"] = list(k.direction_shape)
    return entry


def kernel_units(manifest: dict) -> list[tuple[str, list[str]]]:
    """The kernels' translation units as (name, extra compiler flags): the core kernels at
    the default -O3, and each further section of the source (emit.source_sections: an
    optional group, or one of its kernels above OWN_UNIT_OPS operations) in a unit of its
    own, compiled in parallel with the others, at the optimisation GROUP_OPT gives the size
    of its largest kernel."""
    from .emit import source_sections
    P = manifest["name"].upper()
    kernels = manifest["kernels"]
    sections = source_sections({n: info["ops_after"] for n, info in sorted(kernels.items())})
    skip = {sec: f"-D{P}_SKIP_{sec.upper()}" for sec in sections}
    units = [("kernels", [f"-D{P}_SKIP_INTEGRATOR",
                          *(flag for sec, flag in skip.items() if sec != "core")])]
    for sec, names in sections.items():
        if sec == "core":
            continue
        largest = max(kernels[n]["ops_after"] for n in names)
        opt = next((flags for floor, flags in GROUP_OPT if largest > floor), GROUP_OPT[-1][1])
        if sec == "carry" and largest <= CARRY_O3_OPS:
            opt = []      # the integrator's carried quantities run on these: -O3, as core

        units.append((sec, [f"-D{P}_SKIP_INTEGRATOR",
                            *(flag for other, flag in skip.items() if other != sec), *opt]))
    return units


def _run_compiler(commands: list[list[str]]) -> list[float]:
    """Run compiler commands concurrently, at most one per processor (each may need hundreds
    of MB for a large unit); raises BuildError with the first failure's message (the last
    lines of its output). Returns each command's wall time in seconds, polled every 20 ms
    (output goes to files, so no pipe can fill and stall a compiler)."""
    t0 = time.perf_counter()
    limit = max(1, os.cpu_count() or 1)
    logs = [tempfile.TemporaryFile(mode="w+") for _ in commands]
    procs: list = [None] * len(commands)
    started = [0.0] * len(commands)
    seconds = [0.0] * len(commands)
    failure = None
    try:
        while True:
            now = time.perf_counter()
            running = 0
            for i, p in enumerate(procs):
                if p is not None and not seconds[i]:
                    if p.poll() is None:
                        running += 1
                    else:
                        seconds[i] = round(now - started[i], 3)
            for i, argv in enumerate(commands):
                if procs[i] is None and running < limit:
                    try:
                        procs[i] = subprocess.Popen(argv, stdout=logs[i],
                                                    stderr=subprocess.STDOUT, text=True)
                    except OSError as exc:
                        raise BuildError(f"C compiler failed to run: {exc}") from None
                    started[i] = time.perf_counter()
                    running += 1
            if all(seconds) or now - t0 > COMPILE_TIMEOUT:
                break
            time.sleep(0.02)
        for argv, proc, log in zip(commands, procs, logs):
            if proc is None or proc.poll() is None:
                if proc is not None:
                    proc.kill()
                    proc.wait()
                failure = failure or (f"C compiler timed out after {COMPILE_TIMEOUT} s "
                                      f"({' '.join(argv[:3])} ...)")
                continue
            if proc.returncode != 0 and failure is None:
                log.seek(0)
                tail = log.read().strip().splitlines()[-15:]
                failure = ("C compilation failed (" + " ".join(argv[:3]) + " ...):\n"
                           + "\n".join(tail))
    finally:
        for proc in procs:
            if proc is not None and proc.poll() is None:
                proc.kill()
                proc.wait()
        for log in logs:
            log.close()
    if failure:
        raise BuildError(failure)
    return seconds


def load_extension(entry: CacheEntry):
    """Import the entry's compiled extension module (once per process). The binary must match
    its recorded sha256 (ensure_binary rebuilds it otherwise); BuildError if it does not or
    if it is not the module of this spec."""
    b = entry.manifest["binary"]
    name = b["module"]
    if name in sys.modules:
        return sys.modules[name]
    path = entry.directory / b["file"]
    if not _binary_ok(entry):
        raise BuildError(f"compiled kernels {path} do not match their recorded sha256 "
                         "(damaged cache entry)")
    loader = importlib.machinery.ExtensionFileLoader(name, str(path))
    spec = importlib.util.spec_from_file_location(name, str(path), loader=loader)
    module = importlib.util.module_from_spec(spec)
    try:
        loader.exec_module(module)
    except ImportError as exc:
        raise BuildError(f"cannot load compiled kernels {path}: {exc}") from None
    probe = f"{entry.manifest['name']}_default_params"
    if not hasattr(getattr(module, "lib", None), probe):
        raise BuildError(f"compiled kernels {path} are not those of spec "
                         f"{entry.manifest['name']!r} (no {probe})")
    sys.modules[name] = module
    return module


def load_numpy_module(entry: CacheEntry):
    """Import the entry's generated NumPy module (once per process); a damaged one (sha256
    differs from the manifest's) is regenerated first."""
    where = hashlib.sha256(str(entry.directory.resolve()).encode()).hexdigest()[:12]
    name = f"_metricc_np_{entry.manifest['spec_sha256'][:16]}_{where}"
    if name in sys.modules:
        return sys.modules[name]
    filename = f"{entry.manifest['name']}_numpy.py"
    if damaged_sources(entry, [filename]):
        entry = regenerate(entry)
    path = entry.path(filename)
    spec = importlib.util.spec_from_file_location(name, str(path))
    module = importlib.util.module_from_spec(spec)
    try:
        spec.loader.exec_module(module)
    except Exception as exc:  # only files given by the user (verify --dir) get here unchecked
        raise BuildError(f"cannot import generated NumPy kernels {path}: "
                         f"{type(exc).__name__}: {exc}") from None
    sys.modules[name] = module
    return module
