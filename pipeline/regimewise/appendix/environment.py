"""environment.json: the software and platform a run used, without host names, paths or times.

Python and the platform; every installed distribution and its version (:mod:`importlib.metadata`); the BLAS and
OpenMP libraries loaded and their thread counts (threadpoolctl, without their file paths); the environment
variables that set thread counts or hashing; regimewise's version, a SHA-256 of its installed source files and
of the workflow files beside it; the git commit of the checkout and whether its tracked files were unchanged.
"""

from __future__ import annotations

import hashlib
import os
import platform
import re
import subprocess
from importlib import metadata
from pathlib import Path

from threadpoolctl import threadpool_info

from regimewise import __version__

PACKAGE_DIR = Path(__file__).resolve().parent.parent

THREAD_VARIABLES = (
    "OMP_NUM_THREADS",
    "OPENBLAS_NUM_THREADS",
    "MKL_NUM_THREADS",
    "BLIS_NUM_THREADS",
    "VECLIB_MAXIMUM_THREADS",
    "NUMEXPR_NUM_THREADS",
    "PYTHONHASHSEED",
)

LIBRARY_KEYS = ("user_api", "internal_api", "prefix", "version", "num_threads", "threading_layer", "architecture")


def distributions() -> dict[str, str]:
    """Every installed distribution (name normalised as PEP 503 says) and its version; the first found on the
    import path wins, as for imports. Each distribution's metadata file is parsed once (``dist.version`` would
    parse it again)."""
    found: dict[str, str] = {}
    for dist in metadata.distributions():
        fields = dist.metadata
        name = fields["Name"]
        if name:
            found.setdefault(re.sub(r"[-_.]+", "-", name).lower(), fields["Version"])
    return dict(sorted(found.items()))


def thread_libraries() -> list[dict]:
    """The BLAS/OpenMP libraries loaded in this process and their settings (no file paths)."""
    libraries = [{key: info.get(key) for key in LIBRARY_KEYS} for info in threadpool_info()]
    return sorted(libraries, key=lambda lib: tuple(str(lib[key]) for key in LIBRARY_KEYS))


def tree_digest(root: Path, files: list[Path]) -> str:
    r"""SHA-256 of the lines ``<sha256>  <relative path>`` (sorted by path), as ``sha256sum`` prints them: in the
    package folder, ``find . -type f ! -path '*/__pycache__/*' | sed 's|^\./||' | LC_ALL=C sort | xargs sha256sum |
    sha256sum`` recomputes the source hash."""
    lines = []
    for path in sorted(files, key=lambda p: p.relative_to(root).as_posix()):
        lines.append(f"{hashlib.sha256(path.read_bytes()).hexdigest()}  {path.relative_to(root).as_posix()}\n")
    return hashlib.sha256("".join(lines).encode("utf-8")).hexdigest()


def source_files(package_dir: Path = PACKAGE_DIR) -> list[Path]:
    """The package's installed files, compiled caches left out."""
    return [p for p in package_dir.rglob("*") if p.is_file() and "__pycache__" not in p.parts and p.suffix != ".pyc"]


def workflow_files(repository: Path) -> list[Path]:
    """The Snakefile and the rules beside the package (a checkout), or none."""
    if not (repository / "Snakefile").is_file():
        return []
    rules = [p for p in (repository / "rules").rglob("*") if p.is_file() and "__pycache__" not in p.parts]
    return [repository / "Snakefile", *rules]


def git_state(repository: Path) -> dict | None:
    """The checkout's commit and whether its tracked files match it; None outside a git checkout or without git."""
    try:
        commit = _git(repository, "rev-parse", "HEAD")
        changed = _git(repository, "status", "--porcelain", "--untracked-files=no")
    except (OSError, subprocess.SubprocessError):
        return None
    return {"commit": commit.strip(), "clean": changed.strip() == ""}


def _git(repository: Path, *args: str) -> str:
    return subprocess.run(
        ["git", "-C", str(repository), *args], capture_output=True, text=True, check=True, timeout=30
    ).stdout


def software_fingerprint(package_dir: Path = PACKAGE_DIR) -> str:
    """SHA-256 of the package's source, the workflow files and every distribution's version: the appendix rule's
    parameter, so environment.json is rewritten whenever any of them changes (not only the code a stage uses)."""
    repository = package_dir.parent.parent
    parts = [tree_digest(package_dir, source_files(package_dir))]
    workflow = workflow_files(repository)
    parts.append(tree_digest(repository, workflow) if workflow else "")
    parts += [f"{name}=={version}" for name, version in distributions().items()]
    return hashlib.sha256("\n".join(parts).encode("utf-8")).hexdigest()


def environment_record(package_dir: Path = PACKAGE_DIR) -> dict:
    """Everything environment.json holds."""
    repository = package_dir.parent.parent
    workflow = workflow_files(repository)
    return {
        "python": {
            "version": platform.python_version(),
            "implementation": platform.python_implementation(),
            "compiler": platform.python_compiler(),
        },
        "platform": {
            "system": platform.system(),
            "release": platform.release(),
            "machine": platform.machine(),
            "libc": " ".join(platform.libc_ver()).strip(),
            "cpu_count": os.cpu_count(),
        },
        "distributions": distributions(),
        "thread_libraries": thread_libraries(),
        "thread_variables": {name: os.environ.get(name) for name in THREAD_VARIABLES},
        "regimewise": {
            "version": __version__,
            "source_sha256": tree_digest(package_dir, source_files(package_dir)),
            "workflow_sha256": tree_digest(repository, workflow) if workflow else None,
        },
        "git": git_state(repository) if workflow else None,
    }
