"""What a generated header records (model hash, exact options, sensor components, status order,
long functions) and how ``generate --check`` tells option drift from content drift."""

from __future__ import annotations

import hashlib
import re
import shutil
import subprocess
import sys

import estgen
from estgen.filters import generate

from conftest import ROOT, example_model


def run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "estgen", *args], cwd=ROOT, capture_output=True, text=True)


def test_header_records_hash_and_options():
    """The recorded hash is the SHA-256 of the model file (FIPS 180-4, as hashlib and sha256sum
    compute it); the options line is the generate command's options in a fixed order."""
    path = example_model("beacon_rover")
    gen = generate(estgen.load_model(path), filter="ukf", precision="float", gates={"compass": 0.99}, alpha=0.5)
    head = gen.header
    digest = hashlib.sha256(open(path, "rb").read()).hexdigest()
    assert f"model file sha256: {digest}" in head
    assert "options: --filter ukf --precision float --commit-check subtractive --gate compass=0.99 --alpha 0.5 --optimize speed" in head
    # sensor components with their units; the status precedence; the long-function deviation
    assert re.search(r"z\[0\] = sqrt\(.*\) \[m\]", head)
    assert "z[0] = psi [rad] (angle, innovation wrapped)" in head
    assert "first check in call order wins" in head
    assert re.search(r"rover_ukf_predict: \d+ lines", head)


def test_long_functions_counted_as_lines_of_the_body():
    from estgen.emit import long_functions

    src = "static int f(int a)\n{\n" + "    a += 1;\n" * 61 + "    return a;\n}\n" + "int g(void)\n{\n    return 0;\n}\n"
    assert long_functions(src) == [("f", 62)]


def test_check_tells_option_drift_from_model_drift(tmp_path):
    model = tmp_path / "cart.py"
    shutil.copy(example_model("linear_cart"), model)
    out = tmp_path / "c"
    assert run("generate", str(model), "-o", str(out), "-q").returncode == 0
    proc = run("generate", str(model), "--commit-check", "diagonal", "-o", str(out), "--check")
    assert proc.returncode == 1
    assert "options differ" in proc.stdout and "--commit-check diagonal" in proc.stdout
    model.write_text(model.read_text() + "\n# a comment changes the bytes, hence the hash\n")
    proc = run("generate", str(model), "-o", str(out), "--check")
    assert proc.returncode == 1 and "model changed" in proc.stdout and "options differ" not in proc.stdout
    assert run("generate", str(model), "-o", str(out), "-q").returncode == 0
    (out / "cart_ekf.c").write_text((out / "cart_ekf.c").read_text() + "/* edit */\n")
    proc = run("generate", str(model), "-o", str(out), "--check")
    assert proc.returncode == 1 and "content differs" in proc.stdout
