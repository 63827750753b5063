"""The embedded proof: every example's generated C cross-compiles for Cortex-M0+, M4F and M7
with the contract's warnings, references no heap, stdio or exit (and, in float builds, no
double-precision code), uses only static stack, and runs bare-metal on an emulated Cortex-M4F
to the float64 reference filter's answer.

These tests need arm-none-eabi-gcc, arm-none-eabi-binutils and qemu-system-arm; without them
they fail (estgen.cross raises ToolMissing), they never skip.
"""

from __future__ import annotations

import importlib.util
from pathlib import Path
from typing import Dict, Tuple

import numpy as np
import pytest

import estgen
from estgen.verify import state_sigma
from estgen import cross
from estgen.errors import ModelError
from estgen.filters import check_filter_support
from estgen.simulate import make_scenario

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = sorted(p.parent.name for p in (ROOT / "generated_examples").glob("*/model.py"))
# The UKF generator is a separate module of the generator: test the UKF once it exists.
FILTERS = ["ekf"] + (["ukf"] if importlib.util.find_spec("estgen.emit_ukf") is not None else [])
PRECISIONS = ["float", "double"]
CORES = ["cortex-m0plus", "cortex-m4f", "cortex-m7"]

REPLAY_STEPS = 200
REPLAY_SEED = 20261201


def test_examples_found() -> None:
    # the parametrization below must not silently run over nothing
    assert len(EXAMPLES) >= 5, EXAMPLES


_generated: Dict[Tuple[str, str, str], Tuple[Path, Path]] = {}


def _supported(example: str, filt: str) -> bool:
    """A model the EKF cannot differentiate is refused by design (contract: use the UKF)."""
    spec = estgen.load_model(ROOT / "generated_examples" / example / "model.py")
    try:
        check_filter_support(spec, filt)
    except ModelError:
        return False
    return True


@pytest.fixture(scope="session")
def generated(tmp_path_factory: pytest.TempPathFactory):
    """Generate each (example, filter, precision) once per session through `estgen generate`."""

    def get(example: str, filt: str, precision: str) -> Tuple[Path, Path]:
        key = (example, filt, precision)
        if key not in _generated:
            out = tmp_path_factory.mktemp(f"{example}_{filt}_{precision}")
            _generated[key] = cross.generate(ROOT / "generated_examples" / example / "model.py", filt, precision, out)
        return _generated[key]

    return get


_objects: Dict[Tuple[str, str, str, str], Path] = {}


@pytest.fixture(scope="session")
def compiled(generated, tmp_path_factory: pytest.TempPathFactory):
    """Each (example, filter, precision, core) compiled once per session (and cached across
    sessions by estgen.cross.compile_object)."""

    def get(example: str, filt: str, precision: str, core: str) -> Path:
        key = (example, filt, precision, core)
        if key not in _objects:
            header, source = generated(example, filt, precision)
            out = tmp_path_factory.mktemp(f"{example}_{filt}_{precision}_{core}")
            _objects[key] = cross.compile_object(source, core, out, include_dirs=[header.parent])
        return _objects[key]

    return get


def _copy_generated(header: Path, tmp_path: Path) -> Path:
    """A private copy of the generated files, to add this test's replay_data.h beside."""
    gen = tmp_path / "gen"
    gen.mkdir()
    for f in header.parent.iterdir():
        if f.is_file():
            (gen / f.name).write_bytes(f.read_bytes())
    return gen


def _params():
    for ex in EXAMPLES:
        for filt in FILTERS:
            if _supported(ex, filt):
                yield ex, filt


@pytest.mark.parametrize("precision", PRECISIONS)
@pytest.mark.parametrize("example,filt", list(_params()))
def test_cross_compiles_clean(generated, compiled, example: str, filt: str, precision: str) -> None:
    header, source = generated(example, filt, precision)
    for core in CORES:
        # contract section 4: the warning set with -Werror; compile_object adds -O2 -fstack-usage
        obj = compiled(example, filt, precision, core)
        undef = cross.undefined_symbols(obj, core)
        bad = cross.forbidden_references(undef, precision, core)
        assert not bad, f"{core}: {source.name} references {bad}"
        # GCC manual, -fstack-usage: "static" means the frame size is fixed at compile time;
        # "dynamic" would mean alloca or a variable-length array.
        su = cross.parse_stack_usage(obj.with_suffix(".su").read_text())
        assert su, f"{core}: no stack usage written"
        dynamic = {f: e.qualifiers for f, e in su.items() if e.qualifiers != ("static",)}
        assert not dynamic, f"{core}: non-static stack in {dynamic}"
        # contract section 4: no global mutable state, so nothing in .data or .bss
        sizes = cross.section_sizes(obj, core)
        assert sizes["data"] == 0 and sizes["bss"] == 0, f"{core}: global state {sizes}"
        # the public API of contract section 4 is there, and no call chain recurses
        # (worst_stack raises ValueError on a cycle in GCC's call graph)
        prefix = f"{header.stem}"
        defined = cross.defined_functions(obj, core)
        for fn in (f"{prefix}_init", f"{prefix}_predict"):
            assert fn in defined, f"{core}: {fn} not defined"
        frames, edges = cross.parse_callgraph(obj.with_suffix(".ci").read_text())
        for fn in defined:
            cross.worst_stack(frames, edges, fn)


@pytest.mark.parametrize("example,filt", list(_params()))
def test_float_build_on_m4f_has_no_double_code(compiled, example: str, filt: str) -> None:
    """Contract: a float build uses float arithmetic and f-suffixed math only. On the M4F
    (single-precision FPU) any double would show up as an __aeabi_d* helper call (Arm RTABI32,
    4.1.2) or a call of a double <math.h> function."""
    obj = compiled(example, filt, "float", "cortex-m4f")
    undef = cross.undefined_symbols(obj, "cortex-m4f")
    doubles = [s for s in undef if s in cross.DOUBLE_MATH or s.startswith("__aeabi_d") or s.endswith("2d")]
    assert not doubles, doubles


def _replay(generated, compiled, tmp_path: Path, example: str, filt: str, precision: str, steps: int):
    """Simulate a scenario, build the bare-metal replay of it and run it on QEMU."""
    header, _ = generated(example, filt, precision)
    spec = estgen.load_model(ROOT / "generated_examples" / example / "model.py")
    gen = _copy_generated(header, tmp_path)
    scen = make_scenario(spec, steps, REPLAY_SEED)
    cross.write_replay(spec, filt, precision, scen, gen)
    elf = cross.build_firmware(gen, spec.name, filt, tmp_path / "build",
                               filter_obj=compiled(example, filt, precision, "cortex-m4f"))
    return spec, scen, cross.run_qemu(elf, precision)


@pytest.mark.parametrize("example,filt", list(_params()))
def test_replay_on_emulated_m4f_matches_reference(generated, compiled, tmp_path: Path, example: str,
                                                  filt: str) -> None:
    """The float filter, bare-metal on QEMU mps2-an386, ends within 0.02 sigma of the float64
    reference (sigma from the reference's P) on the same recorded scenario."""
    spec, scen, res = _replay(generated, compiled, tmp_path, example, filt, "float", REPLAY_STEPS)
    x_ref, P_ref, statuses = cross.reference_replay(spec, filt, "float", scen)
    sigma = np.sqrt(np.diag(P_ref))
    # x against sigma per entry (an attitude's four entries: half the rms of its rotation sigma)
    dev = np.abs(res.x - x_ref) / state_sigma(spec, sigma[None, :])[0]
    assert res.x.shape == (spec.n,)
    assert np.all(np.isfinite(res.x))
    assert np.all(dev <= 0.02), f"deviation / sigma = {dev}"
    # and the covariance: |dP_ij| <= 0.02 sigma_i sigma_j
    dP = np.abs(res.P - P_ref) / np.outer(sigma, sigma)
    assert np.all(dP <= 0.02), f"max covariance deviation {dP.max()}"
    # the same calls were refused (a non-zero status) on the target as by the reference
    refused = res.predict.refused + sum(s.refused for s in res.updates.values())
    assert refused == sum(1 for s in statuses if s != 0)
    assert res.predict.calls == REPLAY_STEPS
    assert sum(s.calls for s in res.updates.values()) == sum(len(m) for m in scen.measurements)


@pytest.mark.parametrize("example,filt", list(_params()))
def test_double_replay_on_emulated_m4f_matches_reference(generated, compiled, tmp_path: Path, example: str,
                                                         filt: str) -> None:
    """A double build on the M4F runs through the compiler's software double routines; it must
    still agree with the float64 reference as the contract's verify demands of double:
    |dx_i| <= 1e-9 max(|x_i|, sigma_i) (estgen verify's tolerance)."""
    spec, scen, res = _replay(generated, compiled, tmp_path, example, filt, "double", 100)
    x_ref, P_ref, _ = cross.reference_replay(spec, filt, "double", scen)
    scale = np.maximum(np.abs(x_ref), state_sigma(spec, np.sqrt(np.diag(P_ref))[None, :])[0])
    assert np.all(np.abs(res.x - x_ref) <= 1e-9 * scale), (res.x - x_ref) / scale
    sigma = np.sqrt(np.diag(P_ref))
    assert np.all(np.abs(res.P - P_ref) <= 1e-9 * np.outer(sigma, sigma))


# A model with no inputs (predict gets u = NULL) and a wrapped angle state: a free-spinning
# turntable slowing under bearing drag, read by an optical index sensor (invented for this test).
_NO_INPUT_MODEL = """
import sympy as sp
from estgen import Model

model = Model("turntable")
(phi,) = model.states("phi", angle=True)
(rate,) = model.states("rate")
drag = model.param("drag", 0.08)
dt = model.dt
model.dynamics([rate, -drag * rate], method="rk4")
model.process_noise(sp.diag(1e-6, 4e-4) * dt)
model.sensor("index", [phi], noise=[0.01 ** 2], angles=[0])
model.initial([0.5, 6.0], sp.diag(0.05, 0.25))
model.scenario(dt=0.05)
"""


@pytest.mark.parametrize("filt", FILTERS)
def test_replay_without_inputs(tmp_path: Path, filt: str) -> None:
    """NU == 0: the replay passes u = NULL (contract section 4) and the angle state stays
    wrapped; the result matches the reference like the examples do."""
    model = tmp_path / "turntable.py"
    model.write_text(_NO_INPUT_MODEL)
    spec = estgen.load_model(model)
    gen = tmp_path / "gen"
    header, source = cross.generate(model, filt, "float", gen)
    scen = make_scenario(spec, 150, REPLAY_SEED)
    cross.write_replay(spec, filt, "float", scen, gen)
    assert "(const replay_real *)NULL" in (gen / "replay_data.h").read_text()
    res = cross.run_qemu(cross.build_firmware(gen, spec.name, filt, tmp_path / "build"), "float")
    x_ref, P_ref, statuses = cross.reference_replay(spec, filt, "float", scen)
    assert not any(statuses) and res.predict.refused == 0
    assert -np.pi < res.x[0] <= np.pi  # wrapped to (-pi, pi] (model.states(angle=True))
    d = res.x - x_ref
    d[0] = (d[0] + np.pi) % (2 * np.pi) - np.pi  # an angle difference, itself wrapped
    assert np.all(np.abs(d) <= 0.02 * np.sqrt(np.diag(P_ref))), d


def test_parse_replay_output() -> None:
    """The replay's records decode as main.c documents them."""
    res = cross.parse_replay_output(
        "calib 20000 1000 2000\noverhead 256 38\npredict 1 3 0 0\nx 0 3f800000\nx 1 40000000\n"
        "P 0 3f800000\nP 1 bf000000\nP 2 40400000\nend\n", "float")
    assert res.instructions_per_tick() == pytest.approx(40.0)  # 40000 instructions in 1000 ticks
    assert res.x[0] == 1.0  # IEEE-754 single 0x3f800000 is 1.0 (IEEE 754-2008, binary32)
    assert res.x[1] == 2.0  # 0x40000000
    # packed upper triangle row by row (the generated header's layout): P00, P01, P11
    assert res.P.tolist() == [[1.0, -0.5], [-0.5, 3.0]]  # 0xbf000000 = -0.5, 0x40400000 = 3.0
    with pytest.raises(RuntimeError):
        cross.parse_replay_output("calib 1 2 3\n", "float")  # a run that never reached "end"


def test_qemu_systick_counts_instructions(generated, tmp_path: Path) -> None:
    """With -icount shift=0 QEMU advances virtual time 1 ns per instruction (QEMU docs,
    "-icount"), and mps2-an386's SysTick runs from the 25 MHz system clock (AN386 FPGA image,
    from memory): one tick is then 40 instructions. The replay's calibration loop measures it."""
    example = "linear_cart"
    header, _ = generated(example, "ekf", "float")
    spec = estgen.load_model(ROOT / "generated_examples" / example / "model.py")
    gen = _copy_generated(header, tmp_path)
    cross.write_replay(spec, "ekf", "float", make_scenario(spec, 20, 3), gen)
    res = cross.run_qemu(cross.build_firmware(gen, spec.name, "ekf", tmp_path / "build"), "float")
    # 25 MHz SysTick clock against 1 ns per instruction (see the test above): 40 per tick
    assert res.instructions_per_tick() == pytest.approx(40.0, rel=1e-3)
    # a predict of a 3-state EKF is more than a few instructions and far less than a million
    assert 20 < res.instructions_per_call(res.predict) < 1e6


def test_replay_command(tmp_path: Path) -> None:
    model = ROOT / "generated_examples" / "linear_cart" / "model.py"
    from estgen.cli import main

    assert main(["replay", str(model), "--steps", "30", "-o", str(tmp_path), "-q"]) == 0
    text = (tmp_path / "replay_data.h").read_text()
    assert "#define REPLAY_STEPS 30u" in text and "cart_ekf_update_encoder" in text
    # a model file that does not exist is bad input (contract section 2: exit 2)
    assert main(["replay", str(tmp_path / "nope.py"), "-o", str(tmp_path)]) == 2
