"""The command line: ``estgen generate | verify | simulate | soak | report | compare``.

Exit codes: 0 success; 1 a check failed (stale files for ``generate --check``, a deviation over
tolerance for ``verify``); 2 bad input (a model file or option the user must fix; one short
message, no traceback).
"""

from __future__ import annotations

import argparse
import json
import os
import re
import sys
import time
from typing import Any, Dict, List, Optional, Sequence

from . import filters
from ._version import __version__
from .errors import ModelError, ToolMissing
from .filters import FilterSetup
from .outputs import stale_files, write_generated

__all__ = ["main"]


_RECORD = re.compile(r"^ \*   (model file sha256|options): (.*)$", re.M)


def _record(text: str) -> Dict[str, str]:
    return {m.group(1): m.group(2).strip() for m in _RECORD.finditer(text)}


def drift(files: Dict[str, str], out_dir: str, name: str) -> str:
    """Why the copy of ``name`` in ``out_dir`` differs from ``files[name]``: the generate options,
    the model file, or other content (another estgen version, or an edit), read from the records
    in the header that goes with it."""
    path = os.path.join(out_dir, name)
    if not os.path.exists(path):
        return "missing"
    header = name[:-2] + ".h" if name.endswith(".c") else name
    try:
        with open(os.path.join(out_dir, header), "r", encoding="utf-8") as fh:
            old = _record(fh.read())
    except OSError:
        old = {}
    new = _record(files.get(header, ""))
    if old.get("options") != new.get("options"):
        return f"options differ: file made with '{old.get('options', '?')}', now '{new.get('options', '?')}'"
    if old.get("model file sha256") != new.get("model file sha256"):
        return "model changed (its sha256 differs from the one recorded in the header)"
    return "content differs with the same model and options (another estgen version, or an edit)"


def _cmd_generate(args: argparse.Namespace) -> int:
    from .model import load_model

    setup = FilterSetup.from_args(args)
    spec = load_model(args.model)
    if args.outputs:
        from .emit import output_names

        for name in output_names(spec, args.filter):
            print(os.path.join(args.out, name))
        return 0
    from .progress import Progress, reporting, wanted

    t0 = time.perf_counter()
    # the stages on stderr (a terminal, or --progress); the summary line below ends it
    with Progress(f"generate {spec.name}_{args.filter}", None, wanted(args.quiet, args.progress), clear=True) as bar, \
            reporting(bar):
        gen = setup.generate(spec)
    elapsed = time.perf_counter() - t0
    if args.check:
        stale = stale_files(gen.files, args.out)
        for name in stale:
            print(f"{os.path.join(args.out, name)}: {drift(gen.files, args.out, name)}")
        if stale:
            print(f"estgen generate --check: {len(stale)} file(s) stale; regenerate with the same options "
                  "without --check", file=sys.stderr)
            return 1
        return 0
    write_generated(gen.files, args.out)
    if args.depfile:
        from .buildtools import touch, write_depfile

        outs = [os.path.join(args.out, name) for name in sorted(gen.files)]
        touch(outs)  # newer than every input, changed or not (see estgen.buildtools)
        write_depfile(args.depfile, outs, [spec.source, *spec.local_imports])
    if not args.quiet:
        for name in sorted(gen.files):
            print(os.path.join(args.out, name))
        if "predict" in gen.ops:
            ops = gen.ops["predict"]
            cost = f"predict {ops.get('add', 0)} add {ops.get('mul', 0)} mul {ops.get('div', 0)} div"
        else:  # the particle filter: its cost is per particle (f once per particle and predict)
            ops = gen.ops.get("f", {})
            cost = (f"{getattr(gen, 'particles', '?')} particles, f {ops.get('add', 0)} add {ops.get('mul', 0)} mul "
                    f"{ops.get('div', 0)} div per particle")
        print(f"{gen.prefix}: {gen.lines_of_c} lines of C, struct {gen.struct_bytes} bytes, {cost}, "
              f"generated in {elapsed:.2f} s", file=sys.stderr)
    return 0


def _cmd_verify(args: argparse.Namespace) -> int:
    from .verify import format_result, verify

    from .progress import wanted

    res = verify(args.model, steps=args.steps, seed=args.seed, dt=args.dt, progress=wanted(args.quiet, args.progress),
                 **FilterSetup.from_args(args).kwargs(runtime=False))
    text = format_result(res)
    print(text.splitlines()[-1].strip() if args.quiet else text)
    if args.json:
        with open(args.json, "w", encoding="utf-8") as fh:
            json.dump(res.as_dict(), fh, indent=2)
    return 0 if res.ok else 1


class _PrintAndExit(argparse.Action):
    """A top-level option that prints one line and exits 0 (like --version)."""

    def __init__(self, option_strings: Sequence[str], dest: str, text: Any = None, **kw: Any) -> None:
        super().__init__(option_strings, dest, nargs=0, default=argparse.SUPPRESS, **kw)
        self.text = text

    def __call__(self, parser: argparse.ArgumentParser, namespace: argparse.Namespace, values: Any,
                 option_string: Optional[str] = None) -> None:
        print(self.text())
        parser.exit(0)


def _cmd_replay(args: argparse.Namespace) -> int:
    from .cross import write_replay
    from .model import load_model
    from .simulate import make_scenario

    setup = filters.FilterSetup.from_args(args)  # validates the options as the other commands do
    spec = load_model(args.model)
    scen = make_scenario(spec, args.steps, args.seed)
    path = write_replay(spec, setup.name, setup.precision, scen, args.out)
    if not args.quiet:
        print(path)
    return 0


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="estgen",
        description="Generate fixed-size, allocation-free C for nonlinear Kalman filters from a sympy model, "
                    "and check it against a reference filter.",
        epilog="Exit codes: 0 ok; 1 check failed (stale files, deviation over tolerance); 2 bad input.",
    )
    p.add_argument("--version", action="version", version=f"estgen {__version__}")
    p.add_argument("--cmake-dir", action=_PrintAndExit, text=lambda: __import__("estgen.buildtools").buildtools.cmake_dir(),
                   help="print the folder holding estgen-config.cmake (cmake -Destgen_DIR=\"$(estgen --cmake-dir)\") and exit")
    sub = p.add_subparsers(dest="command", metavar="COMMAND")

    g = sub.add_parser("generate", help="write the C header and source for a model",
                       description="Write DIR/<name>_<filter>.h and .c for MODEL. With --check, write nothing "
                                   "and list the files in DIR that differ (exit 1 when any does).")
    g.add_argument("model", metavar="MODEL", help="the model file (Python defining `model`)")
    filters.add_arguments(g, "float")
    g.add_argument("-o", "--out", required=True, metavar="DIR", help="output folder")
    g.add_argument("--check", action="store_true", help="write nothing; exit 1 and list stale files")
    g.add_argument("-q", "--quiet", action="store_true", help="print nothing on success, no progress")
    g.add_argument("--progress", action="store_true",
                   help="show the stages (derivation, printing) even when stderr is not a terminal: one line each")
    g.add_argument("--depfile", metavar="FILE",
                   help="also write FILE, the outputs' dependencies (the model and the local Python files it "
                        "imports) in the Make rule format compilers write with -MD; outputs are then always "
                        "rewritten or touched, so Make and Ninja see them newer than their inputs")
    g.add_argument("--outputs", action="store_true",
                   help="print the paths generate would write, one a line, and exit (loads the model only)")
    g.set_defaults(func=_cmd_generate)

    v = sub.add_parser("verify", help="run the generated C and the reference on the same data and compare",
                       description="Simulate truth and measurements from MODEL, run the compiled C and the numpy "
                                   "reference on them, print the largest deviations of x and P. Tolerance: "
                                   "double relative 1e-9; float 0.01 sigma. Exit 0 equal, 1 not, 2 bad input.")
    v.add_argument("model", metavar="MODEL", help="the model file (Python defining `model`)")
    filters.add_arguments(v, "float")
    v.add_argument("--steps", type=int, default=None,
                   help="simulated steps (default: from the model: every sensor 50 updates, three of the "
                        "slowest time constants, at least 200, at most 5000)")
    v.add_argument("--seed", type=filters.seed_value, default=0, help="random seed (default 0)")
    v.add_argument("--dt", type=float, default=None, help="step in seconds (default: the model's scenario dt)")
    v.add_argument("--json", metavar="FILE", help="also write the deviations as JSON")
    v.add_argument("-q", "--quiet", action="store_true", help="print the verdict line only, no progress")
    v.add_argument("--progress", action="store_true", help="show progress even when stderr is not a terminal")
    v.set_defaults(func=_cmd_verify)

    from . import simulate

    s = sub.add_parser("simulate", help="Monte Carlo consistency test (NEES, NIS) of a filter",
                       description="Monte Carlo runs of MODEL's simulated truth through the filter; prints RMSE, "
                                   "NEES and NIS against their 95% chi-square bounds and a verdict.")
    simulate.add_arguments(s)
    s.set_defaults(func=simulate.run)

    from . import soak

    k = sub.add_parser("soak", help="run the C for a long simulated horizon, checking x finite and P positive "
                                    "definite every step", description=soak.__doc__.splitlines()[0])
    soak.add_arguments(k)
    k.set_defaults(func=soak.run)

    rp = sub.add_parser("replay", help="write replay_data.h, a simulated scenario for the bare-metal replay project",
                        description="Simulate a scenario from MODEL and write DIR/replay_data.h, which the replay "
                                    "project (generated_examples/firmware_qemu, shipped as estgen.firmware) builds "
                                    "with the generated filter.")
    rp.add_argument("model", metavar="MODEL", help="the model file (Python defining `model`)")
    # the same filter options as every command (the replay data depends on the kind and precision)
    filters.add_arguments(rp, "float")
    rp.add_argument("--steps", type=int, default=200, help="simulated steps (default 200)")
    rp.add_argument("--seed", type=filters.seed_value, default=0, help="random seed (default 0)")
    rp.add_argument("-o", "--out", required=True, metavar="DIR", help="folder for replay_data.h")
    rp.add_argument("-q", "--quiet", action="store_true", help="print nothing on success")
    rp.set_defaults(func=_cmd_replay)

    from . import report

    r = sub.add_parser("report", help="RAM, stack, flash, operation and instruction counts of the generated C",
                       description="Resource figures of the generated filter on a target.")
    report.add_arguments(r)
    r.set_defaults(func=report.run)

    from . import compare

    c = sub.add_parser("compare", help="run several filters on the same simulated truths, weigh accuracy "
                                       "against cost on the Cortex-M4F and recommend one",
                       description=compare.__doc__.split("\n\n")[0])
    compare.add_arguments(c)
    c.set_defaults(func=compare.run)
    return p


def main(argv: Optional[Sequence[str]] = None) -> int:
    """Entry point of the ``estgen`` command."""
    parser = _parser()
    args = parser.parse_args(argv)
    if not getattr(args, "command", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args))
    except (ModelError, ToolMissing) as err:
        print(str(err), file=sys.stderr)
        return 2
    except OSError as err:  # an output path that cannot be written (-o, --json, --depfile, ...)
        if err.filename is None:
            raise
        print(f"error: {err.filename}: {err.strerror or err}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
