#!/usr/bin/env bash
# Create the project's virtual environment with every dependency, the PETSc/SLEPc stack
# included.  Idempotent: a second run checks and installs nothing.
#
#   bash scripts/bootstrap.sh [VENV_DIR]
#
# PETSc/SLEPc come from, in this order:
#   1. PETSC_DIR / SLEPC_DIR when set (cluster modules, own builds);
#   2. Debian's packages (installed here with apt-get when running as root);
#   3. otherwise the script stops and says how to get them.
set -euo pipefail

VENV="${1:-.venv}"
PYTHON="${PYTHON:-python3}"
# libopenblas0-serial: an optimized BLAS/LAPACK behind Debian's PETSc and MUMPS (it takes
# over libblas.so.3 through update-alternatives); MUMPS's numerical factorization of a 2D
# lattice with 10^6 states is 4x faster than with the reference BLAS, and the serial build's
# solves are 13% faster than the threaded build's, which takes a lock in every small BLAS
# call of MUMPS's solve phase (benchmarks/README.md). One process per core is how MPI runs.
DEBIAN_PACKAGES=(libpetsc-real-dev libslepc-real-dev openmpi-bin libopenmpi-dev pkg-config
                 libopenblas0-serial
                 slurm-wlm munge)  # slurm/munge: the tests' one-node batch cluster

say() { printf 'bootstrap: %s\n' "$*"; }

header_version() {  # header_version FILE PREFIX -> "3.18.5"
    local file="$1" prefix="$2"
    local major minor sub
    major=$(awk -v k="${prefix}_VERSION_MAJOR" '$1=="#define" && $2==k {print $3}' "$file")
    minor=$(awk -v k="${prefix}_VERSION_MINOR" '$1=="#define" && $2==k {print $3}' "$file")
    sub=$(awk -v k="${prefix}_VERSION_SUBMINOR" '$1=="#define" && $2==k {print $3}' "$file")
    printf '%s.%s.%s\n' "$major" "$minor" "$sub"
}

prefer_serial_openblas() {  # the serial OpenBLAS behind libblas/liblapack/libopenblas
    local serial link name
    serial=$(ls -d /usr/lib/*/openblas-serial 2>/dev/null | head -1 || true)
    [[ -n "$serial" ]] || return 0
    for link in libblas.so.3 liblapack.so.3 libopenblas.so.0; do
        name="$link-$(basename "$(dirname "$serial")")"
        [[ -e "$serial/$link" ]] || continue
        if [[ "$(readlink "/etc/alternatives/$name" 2>/dev/null)" != "$serial/$link" ]]; then
            if [[ $(id -u) -eq 0 ]]; then
                say "selecting the serial OpenBLAS for $link (update-alternatives)"
                update-alternatives --quiet --set "$name" "$serial/$link"
            else
                say "note: $link is not the serial OpenBLAS; as root: update-alternatives --set $name $serial/$link"
            fi
        fi
    done
}

# --- 1. locate or install PETSc/SLEPc ---------------------------------------------------
if [[ -z "${PETSC_DIR:-}" ]]; then
    if command -v dpkg >/dev/null 2>&1; then
        missing=()
        for pkg in "${DEBIAN_PACKAGES[@]}"; do
            dpkg -s "$pkg" >/dev/null 2>&1 || missing+=("$pkg")
        done
        if ((${#missing[@]})); then
            if [[ $(id -u) -eq 0 ]]; then
                say "installing Debian packages: ${missing[*]}"
                export DEBIAN_FRONTEND=noninteractive
                apt-get update -qq
                apt-get install -y -qq --no-install-recommends "${missing[@]}"
            else
                say "missing Debian packages: ${missing[*]}"
                say "fix: sudo apt-get install ${missing[*]}   (or set PETSC_DIR and SLEPC_DIR)"
                exit 1
            fi
        fi
        prefer_serial_openblas
        PETSC_DIR=/usr/lib/petsc
        SLEPC_DIR=/usr/lib/slepc
    else
        say "no PETSc found: set PETSC_DIR and SLEPC_DIR (e.g. 'module load petsc slepc'),"
        say "or install PETSc/SLEPc 3.18+ from your distribution, then rerun 'make'."
        exit 1
    fi
fi
SLEPC_DIR="${SLEPC_DIR:-$PETSC_DIR}"
export PETSC_DIR SLEPC_DIR

petsc_header=$(ls "$PETSC_DIR"/include/petscversion.h "$PETSC_DIR"/"${PETSC_ARCH:-}"/include/petscversion.h 2>/dev/null | head -1 || true)
slepc_header=$(ls "$SLEPC_DIR"/include/slepcversion.h 2>/dev/null | head -1 || true)
if [[ -z "$petsc_header" || -z "$slepc_header" ]]; then
    say "PETSC_DIR=$PETSC_DIR / SLEPC_DIR=$SLEPC_DIR hold no petscversion.h / slepcversion.h;"
    say "fix: point both at a PETSc/SLEPc installation prefix."
    exit 1
fi
PETSC_VERSION=$(header_version "$petsc_header" PETSC)
SLEPC_VERSION=$(header_version "$slepc_header" SLEPC)

# --- 2. the virtual environment ---------------------------------------------------------
if [[ ! -x "$VENV/bin/python" ]]; then
    say "creating $VENV"
    "$PYTHON" -m venv "$VENV"
fi
PY="$VENV/bin/python"
PIP=("$PY" -m pip --disable-pip-version-check -q)

installed_version() {  # installed_version DIST -> version or empty
    "$PY" - "$1" <<'PYEOF' 2>/dev/null || true
import sys
from importlib.metadata import version, PackageNotFoundError
try:
    print(version(sys.argv[1]))
except PackageNotFoundError:
    pass
PYEOF
}

# Build tools for the PETSc bindings (numpy first: they compile against it).
setuptools_major=$(installed_version setuptools); setuptools_major=${setuptools_major%%.*}
if [[ -z "$(installed_version numpy)" || -z "$(installed_version Cython)" || "${setuptools_major:-0}" -ge 70 ]]; then
    say "installing build tools"
    "${PIP[@]}" install "setuptools>=61,<70" wheel "cython>=3,<3.2" "numpy>=2"
fi

# --- 3. petsc4py / slepc4py at exactly the installed library versions -------------------
if [[ "$(installed_version petsc4py)" != "$PETSC_VERSION" ]]; then
    say "building petsc4py==$PETSC_VERSION against $PETSC_DIR (a few minutes)"
    "${PIP[@]}" install --no-build-isolation "petsc4py==$PETSC_VERSION"
fi
if [[ "$(installed_version slepc4py)" != "$SLEPC_VERSION" ]]; then
    say "building slepc4py==$SLEPC_VERSION against $SLEPC_DIR (a few minutes)"
    "${PIP[@]}" install --no-build-isolation "slepc4py==$SLEPC_VERSION"
fi

# --- 4. the project itself ----------------------------------------------------------------
stamp="$VENV/.gapline-installed"
if [[ ! -f "$stamp" || pyproject.toml -nt "$stamp" ]]; then
    say "installing gapline and its dependencies"
    "${PIP[@]}" install -e ".[test,mpi]"
    touch "$stamp"
fi
"$PY" -c "import petsc4py, slepc4py, pipeline" || { say "import check failed"; exit 1; }
say "environment ready in $VENV (PETSc $PETSC_VERSION, SLEPc $SLEPC_VERSION)"
