"""Every code snippet in README.md and docs/*.md runs, in the order the page gives them.

Each page gets a fresh folder holding the files its snippets name (the example models under the
names the pages use). Then, block by block:

* ``sh``: run by bash with ``set -e`` (so every command must succeed). Lines changed:
  ``apt-get install X`` becomes a check that X's program is installed; ``pip install`` is left
  out (the tests run the checkout: .ci/run installs it); ``python -m pytest -q`` (this suite)
  becomes a check that .ci/run runs it; Monte Carlo runs are shortened (``--runs 4``).
* ``python``: the page's Python blocks run in order in one interpreter (later blocks use what
  earlier ones defined).
* ``c``: compiled with the contract's strict flags against the generated header it includes
  (generated first); a fragment without a function is wrapped in ``main``.
* ``cmake``: written to CMakeLists.txt, with a ``main.c`` that does nothing, for the next sh block.
* ``make`` / ``ninja``: written to Makefile / build.ninja and run by the tool.
* ``text``: an output sample or a file format, not a program: not run.

A failing snippet fails here with its page and line. Tools come from .ci/run; a missing one fails.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import textwrap
from pathlib import Path
from typing import List, Tuple

import pytest

from conftest import EXAMPLES_DIR, ROOT, require_tool
from test_build_integration import MODEL as TANK_MODEL

RUN_LANGS = {"sh", "python", "c", "cmake", "make", "ninja"}
NOT_RUN = {"text"}

#: files every page's folder holds: name used on the pages -> source
FIXTURES = {
    "model.py": os.path.join(EXAMPLES_DIR, "linear_cart", "model.py"),
    "cart.py": os.path.join(EXAMPLES_DIR, "linear_cart", "model.py"),
    "models/rover.py": os.path.join(EXAMPLES_DIR, "beacon_rover", "model.py"),
    "rover.py": os.path.join(EXAMPLES_DIR, "beacon_rover", "model.py"),
    "nav.py": os.path.join(EXAMPLES_DIR, "strapdown_nav", "model.py"),
    "cell.py": os.path.join(EXAMPLES_DIR, "battery_soc", "model.py"),
    "valve.py": os.path.join(EXAMPLES_DIR, "valve_actuator", "model.py"),
}
TANK = TANK_MODEL  # the tank of docs/build.md, as tests/test_build_integration.py builds it
#: the contract's section 1 model, under the name its C examples use
TANKLINE = textwrap.dedent("""\
    import sympy as sp
    from estgen import Model

    model = Model("tankline")
    h1, h2 = model.states("h1 h2")
    (q_in,) = model.inputs("q_in")
    area = model.param("area", 0.5)
    dt = model.dt
    model.process([h1 + dt * (q_in - 0.01 * sp.sqrt(h1)) / area,
                   h2 + dt * 0.01 * (sp.sqrt(h1) - sp.sqrt(h2)) / area])
    model.process_noise(sp.diag(1e-5, 1e-5) * dt)
    model.sensor("level2", [h2], noise=[0.004**2])
    model.initial([0.6, 0.4], sp.diag(0.05, 0.05))
""")
#: C prefix -> model file in the folder (for c blocks: which header to generate)
PREFIX_MODELS = {"cart": "cart.py", "rover": "rover.py", "nav": "nav.py", "cell": "cell.py", "valve": "valve.py",
                 "tank": "tank.py", "tankline": "tankline.py"}

STRICT = ["-std=c99", "-Wall", "-Wextra", "-Wpedantic", "-Wconversion", "-Wdouble-promotion", "-Wshadow",
          "-Werror"]


def pages() -> List[Path]:
    root = Path(ROOT)
    return [root / "README.md"] + sorted((root / "docs").glob("*.md"))


def blocks(page: Path) -> List[Tuple[str, str, int]]:
    """(language, code, line of the opening fence) of every fenced block."""
    out = []
    lines = page.read_text(encoding="utf-8").splitlines()
    i = 0
    while i < len(lines):
        m = re.match(r"^```(\S*)\s*$", lines[i])
        if m:
            start, lang, body = i + 1, m.group(1), []
            i += 1
            while i < len(lines) and not lines[i].startswith("```"):
                body.append(lines[i])
                i += 1
            out.append((lang, "\n".join(body) + "\n", start))
        i += 1
    return out


def _env() -> dict:
    return {**os.environ, "PYTHONPATH": ROOT + os.pathsep + os.environ.get("PYTHONPATH", "")}


def _sandbox(tmp: Path) -> Path:
    for name, src in FIXTURES.items():
        dst = tmp / name
        dst.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy(src, dst)
    shutil.copy(os.path.join(EXAMPLES_DIR, "cmake_firmware", "motor_constants.py"), tmp)
    # the repository's examples and CI script, read-only, as a fresh clone has them
    os.symlink(EXAMPLES_DIR, tmp / "generated_examples")
    (tmp / ".ci").mkdir()
    shutil.copy(os.path.join(ROOT, ".ci", "run"), tmp / ".ci" / "run")
    (tmp / "tank.py").write_text(TANK)
    (tmp / "tank_consts.py").write_text("AREA = 0.25\n")
    (tmp / "tankline.py").write_text(TANKLINE)
    # the committed C a CI job checks (docs/ci.md)
    subprocess.run([sys.executable, "-m", "estgen", "generate", "models/rover.py", "-o", "firmware/estimator", "-q"],
                   cwd=tmp, check=True, env=_env())
    return tmp


_INSTALL = re.compile(r"^\s*(sudo\s+)?apt-get\s+install\s+(-\S+\s+)*(?P<pkgs>.*)$")
_PIP = re.compile(r"^\s*(python3?\s+-m\s+)?pip3?\s+install\b")
#: Debian package -> a program it installs
PROGRAM = {"gcc": "gcc", "gcc-arm-none-eabi": "arm-none-eabi-gcc", "qemu-system-arm": "qemu-system-arm",
           "valgrind": "valgrind", "cmake": "cmake", "ninja-build": "ninja", "make": "make", "clang": "clang",
           "libnewlib-arm-none-eabi": None, "binutils-arm-none-eabi": "arm-none-eabi-nm"}


#: shortened runs: the same commands with fewer Monte Carlo runs and steps (the pages show the
#: full-length ones; here they only have to run)
SHORTER = [(re.compile(r"--runs \d+"), "--runs 4"), (re.compile(r"--steps \d{4,}"), "--steps 300")]


def _shell(code: str) -> str:
    out = []
    for line in code.splitlines():
        for rx, repl in SHORTER:
            line = rx.sub(repl, line)
        if line.strip() == "python -m pytest -q":
            # the suite itself (this test is part of it): check that CI runs this very command
            out.append("grep -q -- '-m pytest -q' .ci/run")
            continue
        m = _INSTALL.match(line.split("#", 1)[0].rstrip())
        if m:
            progs = [PROGRAM.get(p, p) for p in m.group("pkgs").split() if not p.startswith("-")]
            out += [f"command -v {p} >/dev/null" for p in progs if p]
        elif _PIP.match(line):
            out.append(": estgen is installed from the checkout  # " + line.strip())
        else:
            out.append(line)
    return "\n".join(out) + "\n"


def _c(code: str, folder: Path, where: str) -> None:
    cc = require_tool("gcc")
    inc = re.findall(r'#include "(\w+)_(ekf|ukf|pf)\.h"', code)
    for prefix, filt in inc:
        model = PREFIX_MODELS[prefix]
        subprocess.run([sys.executable, "-m", "estgen", "generate", model, "--filter", filt, "-o", "cgen", "-q"],
                       cwd=folder, check=True, env=_env())
    src = code
    if not re.search(r"^\w[\w\s\*]*\([^;]*\)\s*\{", code, re.M):  # a fragment: put it in main
        heads = [ln for ln in code.splitlines() if ln.startswith("#include")]
        body = [ln for ln in code.splitlines() if not ln.startswith("#include")]
        src = "\n".join(heads) + "\nint main(void)\n{\n" + "\n".join(body) + "\n    return 0;\n}\n"
    path = folder / "snippet.c"
    path.write_text(src)
    objs = [str(folder / "cgen" / f"{p}_{f}.c") for p, f in inc]
    # a program is compiled and linked; functions without a main only compiled
    link = ["-o", str(folder / "snippet")] if re.search(r"\bint main\(", src) else ["-c", "-o", str(folder / "snippet.o")]
    if "-c" in link:
        objs = []
    proc = subprocess.run([cc, *STRICT, "-Wno-unused-variable", "-Wno-unused-but-set-variable", "-I", str(folder / "cgen"),
                           str(path), *objs, "-lm", *link], capture_output=True, text=True)
    assert proc.returncode == 0, f"{where}: the C snippet does not compile:\n{src}\n{proc.stderr}"


@pytest.mark.slow
@pytest.mark.parametrize("page", pages(), ids=lambda p: p.name)
def test_every_snippet_runs(page, tmp_path):
    found = blocks(page)
    unknown = [(lang, line) for lang, _, line in found if lang not in RUN_LANGS | NOT_RUN]
    assert not unknown, f"{page.name}: blocks without a runnable language tag (or 'text'): {unknown}"
    folder = _sandbox(tmp_path)
    python = [(code, line) for lang, code, line in found if lang == "python"]
    for lang, code, line in found:
        where = f"{page.name}:{line}"
        if lang == "sh":
            proc = subprocess.run(["bash", "-e", "-c", _shell(code)], cwd=folder, capture_output=True, text=True,
                                  env=_env(), timeout=1200)
            assert proc.returncode == 0, f"{where}: the shell snippet failed:\n{code}\n{proc.stdout}\n{proc.stderr}"
        elif lang == "c":
            _c(code, folder, where)
        elif lang == "cmake":
            require_tool("cmake")
            (folder / "CMakeLists.txt").write_text(code)
            if not (folder / "main.c").exists():
                (folder / "main.c").write_text("int main(void) { return 0; }\n")
        elif lang == "make":
            (folder / "Makefile").write_text(code)
            proc = subprocess.run([require_tool("make")], cwd=folder, capture_output=True, text=True, env=_env())
            assert proc.returncode == 0, f"{where}: make failed:\n{proc.stdout}\n{proc.stderr}"
        elif lang == "ninja":
            (folder / "build.ninja").write_text(code)
            proc = subprocess.run([require_tool("ninja")], cwd=folder, capture_output=True, text=True, env=_env())
            assert proc.returncode == 0, f"{where}: ninja failed:\n{proc.stdout}\n{proc.stderr}"
    if python:
        script = "\n".join(f"# {page.name}:{line}\n{code}" for code, line in python)
        proc = subprocess.run([sys.executable, "-c", script], cwd=folder, capture_output=True, text=True,
                              env=_env(), timeout=1200)
        assert proc.returncode == 0, f"{page.name}: the Python snippets failed:\n{proc.stdout}\n{proc.stderr}"


def test_the_harness_sees_the_blocks():
    """The parser finds every fence (a parser that found none would pass every page)."""
    text = "intro\n```sh\necho hi\n```\n```text\nout\n```\n"
    page = Path(ROOT) / "tests" / "_snippet_probe.md"
    try:
        page.write_text(text)
        assert blocks(page) == [("sh", "echo hi\n", 2), ("text", "out\n", 5)]
    finally:
        page.unlink()
    assert _shell("sudo apt-get install -y gcc cmake\npython3 -m pip install estgen\nestgen --version\n") == (
        "command -v gcc >/dev/null\ncommand -v cmake >/dev/null\n"
        ": estgen is installed from the checkout  # python3 -m pip install estgen\nestgen --version\n")


def _slug(heading: str) -> str:
    """GitHub's anchor for a heading: lower case, punctuation dropped, spaces to hyphens."""
    text = re.sub(r"[^\w\- ]", "", heading.strip().lower())
    return text.replace(" ", "-")


def test_links_between_pages_resolve():
    """Every relative link of README.md and docs/*.md names a file that exists and, with a
    #fragment, a heading of that file (the pages were split; a stale anchor is easy to leave)."""
    bad = []
    for page in pages():
        text = page.read_text(encoding="utf-8")
        text = re.sub(r"```.*?```", "", text, flags=re.S)  # not inside code blocks
        for target in re.findall(r"\]\(([^)\s]+)\)", text):
            if re.match(r"^[a-z]+:", target):
                continue
            path, _, frag = target.partition("#")
            dest = (page.parent / path).resolve() if path else page
            if not dest.exists():
                bad.append(f"{page.name}: {target} (no such file)")
                continue
            if frag and dest.suffix == ".md":
                heads = [_slug(h) for h in re.findall(r"^#+ (.*)$", dest.read_text(encoding="utf-8"), re.M)]
                if frag not in heads:
                    bad.append(f"{page.name}: {target} (no such heading)")
    assert not bad, "\n".join(bad)
