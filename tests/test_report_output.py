"""What `estgen report` prints: toolchain and flags, mean and worst instructions per call,
microseconds at a stated clock, target and host apart, every column explained.

References: the compiler itself (`arm-none-eabi-gcc --version`), and the replay's own counts
(the slowest call cannot take fewer instructions than the mean one)."""

from __future__ import annotations

import re
import subprocess

import pytest

from estgen.cross import parse_replay_output
from estgen.report import DEFAULT_CLOCK_MHZ, format_report, make_report

from conftest import example_model, require_tool


def test_replay_records_the_slowest_call():
    text = "\n".join(["calib 20000 1000 2000", "overhead 256 512", "predict 10 100 0 64 30",
                      "update gps 5 50 1 80 12", "x 0 3f800000", "P 0 3f800000", "end"])
    res = parse_replay_output(text, "float")
    assert res.predict.max_ticks == 30 and res.updates["gps"].max_ticks == 12
    # 40 instructions per tick (40000 more instructions took 1000 more ticks), bracket 2 ticks
    assert res.instructions_per_call(res.predict) == pytest.approx(40 * (10 - 2))
    assert res.worst_instructions_per_call(res.predict) == pytest.approx(40 * (30 - 2))


@pytest.mark.slow
def test_report_of_an_example():
    require_tool("arm-none-eabi-gcc")
    rep = make_report(example_model("linear_cart"), "ekf", "float", "cortex-m4f", steps=60)
    version = subprocess.run(["arm-none-eabi-gcc", "--version"], capture_output=True, text=True).stdout.splitlines()[0]
    assert rep["toolchain"]["version"] == version.strip()
    flags = rep["toolchain"]["flags"]
    assert "-std=c99" in flags and "-O2" in flags and "-mfpu=fpv4-sp-d16" in flags
    m4 = rep["instructions"]["qemu-cortex-m4f"]
    pred = m4["cart_ekf_predict"]
    assert pred["worst_instructions_per_call"] >= pred["instructions_per_call"] > 0
    text = format_report(rep, clock_mhz=100.0)
    assert version.strip() in text and " ".join(flags) in text
    assert "microseconds at 100 MHz" in text
    row = next(line for line in text.splitlines() if line.strip().startswith("cart_ekf_predict") and "." in line)
    us = float(row.split()[-2])
    assert us == pytest.approx(pred["instructions_per_call"] / 100.0, abs=0.006)
    # host figures in their own table, after the target's
    assert text.index("Target: Cortex-M4F") < text.index("Host (this machine")
    # every column header is explained
    for col in ("stack", "hw", "instr", "worst", "us", "trans"):
        assert re.search(rf"^    {col}\b", text, re.M) or f"   {col} " in text, col
    assert f"{DEFAULT_CLOCK_MHZ:g} MHz" in format_report(rep)
