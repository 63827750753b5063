"""The generated particle filter on microcontroller targets: strict cross builds, no double code
in the float build, and the bare-metal replay on the emulated Cortex-M4F against the reference."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

import estgen
from estgen import cross
from estgen.simulate import make_scenario

from conftest import example_model

N = 60
SEED = 20261202


@pytest.fixture(scope="module")
def rover(tmp_path_factory):
    out = {}
    for precision in ("float", "double"):
        d = tmp_path_factory.mktemp(f"pf_{precision}")
        out[precision] = cross.generate(example_model("beacon_rover"), "pf", precision, d, particles=N)
    return out


@pytest.mark.parametrize("precision", ["float", "double"])
@pytest.mark.parametrize("core", ["cortex-m0plus", "cortex-m4f", "cortex-m7"])
def test_cross_compiles_clean(rover, tmp_path: Path, precision: str, core: str) -> None:
    # contract section 4's warning set with -Werror, on each core; no heap, no stdio
    header, source = rover[precision]
    obj = cross.compile_object(source, core, tmp_path, include_dirs=[header.parent])
    undef = cross.undefined_symbols(obj, core)
    assert not cross.forbidden_references(undef, precision, core), undef
    assert not any(s in undef for s in ("malloc", "free", "printf", "puts", "rand")), undef
    if precision == "float" and core == "cortex-m4f":
        # the M4F's FPU is single precision: a double would appear as an __aeabi_d* call
        assert not [s for s in undef if s in cross.DOUBLE_MATH or s.startswith("__aeabi_d")], undef


def _replay(rover, tmp_path: Path, precision: str, steps: int):
    header, _ = rover[precision]
    spec = estgen.load_model(example_model("beacon_rover"))
    gen = tmp_path / "gen"
    gen.mkdir()
    for f in header.parent.iterdir():
        if f.is_file():
            (gen / f.name).write_bytes(f.read_bytes())
    scen = make_scenario(spec, steps, SEED)
    cross.write_replay(spec, "pf", precision, scen, gen)
    res = cross.run_qemu(cross.build_firmware(gen, spec.name, "pf", tmp_path / "build"), precision)
    return spec, scen, res


@pytest.mark.slow
def test_double_replay_on_m4f_equals_reference(rover, tmp_path: Path) -> None:
    # init seeds the generator with the default seed, as the reference does by default: the
    # same random numbers through newlib's double routines, to the contract's 1e-9
    spec, scen, res = _replay(rover, tmp_path, "double", 60)
    x_ref, P_ref, statuses = cross.reference_replay(spec, "pf", "double", scen, particles=N)
    scale = np.maximum(np.abs(x_ref), np.sqrt(np.diag(P_ref)))
    assert np.all(np.abs(res.x - x_ref) <= 1e-9 * scale), (res.x - x_ref) / scale
    sig = np.sqrt(np.diag(P_ref))
    assert np.all(np.abs(res.P - P_ref) <= 1e-9 * np.outer(sig, sig))
    assert res.predict.refused + sum(s.refused for s in res.updates.values()) == sum(1 for s in statuses if s)


@pytest.mark.slow
def test_float_replay_on_m4f_is_a_realization_of_the_reference(rover, tmp_path: Path) -> None:
    # float rounding may change draws and resampling decisions (see estgen.verify): the final
    # estimate must lie within the spread of the reference run with other seeds
    spec, scen, res = _replay(rover, tmp_path, "float", 60)
    x_ref, P_ref, _ = cross.reference_replay(spec, "pf", "float", scen, particles=N)
    others = [cross.reference_replay(spec, "pf", "float", scen, particles=N, seed=s)[0] for s in range(2, 8)]
    spread = np.max(np.abs(np.array(others) - x_ref), axis=0)
    dev = np.abs(res.x - x_ref)
    assert np.all(np.isfinite(res.x))
    assert np.all(dev <= 1.5 * spread), (dev, spread)
    assert res.predict.calls == 60


@pytest.mark.slow
@pytest.mark.parametrize("precision", ["float", "double"])
def test_sanitized_host_replay(tmp_path: Path, precision: str) -> None:
    # the particle loops, the in-place resampling and roughening under AddressSanitizer and
    # UndefinedBehaviorSanitizer (GCC manual, -fsanitize=address,undefined): a replay that
    # resamples at almost every update (threshold 0.99) and roughens, with an angle state
    import subprocess

    spec = estgen.load_model(example_model("beacon_rover"))
    gen = tmp_path / "gen"
    cross.generate(example_model("beacon_rover"), "pf", precision, gen, particles=40, resample_threshold=0.99,
                   roughening=0.2)
    scen = make_scenario(spec, 80, SEED)
    cross.write_replay(spec, "pf", precision, scen, gen)
    exe = cross.build_host_replay(gen, spec.name, "pf", tmp_path / "build",
                                  extra_cflags="-fsanitize=address,undefined -fno-sanitize-recover=all "
                                               "-fno-omit-frame-pointer")
    proc = subprocess.run([str(exe)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    assert "runtime error" not in proc.stderr and "AddressSanitizer" not in proc.stderr, proc.stderr
    res = cross.parse_replay_output(proc.stdout, precision)
    assert np.all(np.isfinite(res.x))
    if precision == "double":  # the host's libm: the same numbers as the reference
        x_ref, _, _ = cross.reference_replay(spec, "pf", "double", scen, particles=40, resample_threshold=0.99,
                                             roughening=0.2)
        assert np.allclose(res.x, x_ref, rtol=1e-9, atol=1e-9)
