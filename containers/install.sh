#!/usr/bin/env bash
# The one way nl_unwarp is installed into an image, shared by containers/Dockerfile,
# containers/nl_unwarp.def (Apptainer) and CI (.ci/run checks the same wheel in its venv).
#
#   install.sh wheel SRC_DIR WHEEL_DIR   build the wheel of the source tree (no dependencies),
#                                        with the build backend of pyproject.toml, as
#                                        `pip install .` does in CI
#   install.sh install WHEEL_DIR         install that wheel and its dependencies (no cache)
#   install.sh check                     the installed command runs from outside any source
#                                        tree and finds its packaged data (the demo coil)
#
# Coil model files and site configurations are never installed: they are bound in at run time.
set -euo pipefail

python="${PYTHON:-python3}"

die() { echo "install.sh: $*" >&2; exit 1; }

case "${1:-}" in
    wheel)
        [ $# -eq 3 ] || die "usage: install.sh wheel SRC_DIR WHEEL_DIR"
        "$python" -m pip wheel --no-cache-dir --no-deps --wheel-dir "$3" "$2"
        ls "$3"/nl_unwarp-*.whl >/dev/null || die "no nl_unwarp wheel in $3"
        ;;
    install)
        [ $# -eq 2 ] || die "usage: install.sh install WHEEL_DIR"
        shopt -s nullglob
        wheels=("$2"/nl_unwarp-*.whl)
        [ ${#wheels[@]} -eq 1 ] || die "expected one nl_unwarp wheel in $2, found ${#wheels[@]}"
        # The wheel's own files, even where a build of the same version is installed already.
        "$python" -m pip uninstall --yes --quiet nl_unwarp 2>/dev/null || true
        "$python" -m pip install --no-cache-dir "${wheels[0]}"
        ;;
    check)
        scratch="$(mktemp -d)"
        trap 'rm -rf "$scratch"' EXIT
        cd "$scratch"
        nl-unwarp --help >/dev/null
        where="$("$python" -c 'import nl_unwarp; print(nl_unwarp.__file__)')"
        case "$where" in
            */site-packages/*|*/dist-packages/*) ;;
            *) die "nl_unwarp is imported from $where, not from an installed wheel" ;;
        esac
        coil="$("$python" -c 'from nl_unwarp.demo import demo_coil_path; print(demo_coil_path())')"
        nl-unwarp describe "$coil" >/dev/null
        echo "install.sh: nl-unwarp $("$python" -c 'import nl_unwarp; print(nl_unwarp.__version__)') \
installed at ${where%/__init__.py}"
        ;;
    *)
        die "usage: install.sh wheel SRC_DIR WHEEL_DIR | install WHEEL_DIR | check"
        ;;
esac
