"""A solver's problem functions compiled to a shared library, cached by their C source.

casadi evaluates the cost, constraints and their derivatives by walking expression graphs;
the same functions generated as C and compiled with `cc` are evaluated several times faster
(benchmarks/mpc_benchmark.py). The library is compiled once per problem shape: it is cached
in $COVERAGE_FLEET_CACHE/mpc/ under a hash of the generated source and the casadi version,
written atomically so that concurrent robots never load half a file.

The code is generated and compiled in a temporary directory addressed by absolute paths;
the process's working directory is never changed (other threads, e.g. ROS executors, may
resolve relative paths at the same moment).
"""

from __future__ import annotations

import hashlib
import os
import shutil
import subprocess
import tempfile
from pathlib import Path

import casadi as ca

from coverage_fleet.control.cache import cache_root, write_atomically
from coverage_fleet.errors import ConfigError

#: Base name of the generated file (casadi uses it as the C symbol prefix, so it must be a
#: valid identifier: a path is not accepted).
SOURCE_NAME = "tracking_mpc"
COMPILER_ENV = "CC"
DEFAULT_COMPILER = "cc"


def cache_directory() -> Path:
    """$COVERAGE_FLEET_CACHE/mpc, else ~/.cache/coverage_fleet/mpc."""
    return cache_root() / "mpc"


def write_problem_source(solver: ca.Function, folder: Path) -> Path:
    """Write the C source of the solver's problem functions into `folder` (an absolute
    path) and return the file: its oracle and every function derived from it (nlp_f, nlp_g,
    nlp_jac_g, nlp_hess_l, ...), byte for byte what `solver.generate_dependencies` writes,
    which only writes into the working directory."""
    functions = [solver.oracle()] + [solver.get_function(n) for n in solver.get_function()]
    return _write_source(functions, SOURCE_NAME, folder)


def _write_source(functions: list[ca.Function], stem: str, folder: Path) -> Path:
    generator = ca.CodeGenerator(f"{stem}.c")
    for function in functions:
        generator.add(function)
    return Path(generator.generate(f"{folder.resolve()}{os.sep}"))


def compiler_available() -> bool:
    """Whether the C compiler that `compile` uses ($CC, else cc) is on the PATH."""
    return shutil.which(os.environ.get(COMPILER_ENV, DEFAULT_COMPILER)) is not None


def compiled_library(solver: ca.Function) -> Path:
    """Path of the shared library holding the solver's problem functions; casadi loads it
    in place of the expression graphs (pass its path to ca.nlpsol as the problem)."""
    functions = [solver.oracle()] + [solver.get_function(n) for n in solver.get_function()]
    return compiled_functions(functions, SOURCE_NAME)


def compiled_functions(functions: list[ca.Function], stem: str) -> Path:
    """Path of a shared library holding `functions` (load each with
    ca.external(function.name(), path)); `stem` is the C file's base name (a valid C
    identifier: casadi uses it as the symbol prefix)."""
    compiler = os.environ.get(COMPILER_ENV, DEFAULT_COMPILER)
    if shutil.which(compiler) is None:
        raise ConfigError.single(
            "<environment>",
            "mpc.solver.compile",
            f"no C compiler '{compiler}' found (set {COMPILER_ENV}, or compile: false)",
        )
    with tempfile.TemporaryDirectory(prefix="coverage_fleet_mpc_") as name:
        folder = Path(name)
        c_file = _write_source(functions, stem, folder)
        source = c_file.read_bytes()
        key = hashlib.sha256(source + ca.__version__.encode()).hexdigest()[:24]
        library = cache_directory() / f"{key}.so"
        if library.is_file():
            return library
        built = folder / f"{stem}.so"
        command = [compiler, "-O1", "-shared", "-fPIC", str(c_file), "-o", str(built)]
        done = subprocess.run(command, capture_output=True, text=True, cwd=folder)
        if done.returncode != 0:
            raise ConfigError.single(
                "<environment>", "mpc.solver.compile", f"compiling failed: {done.stderr[:400]}"
            )
        if write_atomically(library, built.read_bytes()):
            return library
        # The cache cannot be written: keep a private copy that outlives the folder.
        fallback = Path(tempfile.mkdtemp(prefix="coverage_fleet_mpc_")) / f"{key}.so"
        fallback.write_bytes(built.read_bytes())
        return fallback
