"""Two models in one firmware: a door camera (int8, QOperator, --requant fixed, prefix cam)
and a pump-vibration classifier (uint8, QDQ, --requant float, prefix pump) emitted into one
folder with `emit --add`, built into one program from the two make snippets, on the host
and on an emulated Cortex-M4. Both must match the numpy reference bit for bit; a model built
against kernels configured without what it needs must not compile."""
from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from tests.firmware_progs import PRINT_C, c_bytes, reference_io, run_host, run_target, samples_for
from tinygen.compiler import BuildOptions, compile_model

# The module's program is built once, on one worker (pytest-xdist --dist loadgroup).
pytestmark = pytest.mark.xdist_group("two_models")
ROOT = Path(__file__).resolve().parent.parent
CAM = ROOT / "examples" / "door_camera" / "door_camera.onnx"
PUMP = ROOT / "examples" / "pump_vibration" / "pump_vibration.onnx"
MODELS = (("cam", CAM, "fixed"), ("pump", PUMP, "float"))
SAMPLES = 3


def tinygen(*args, cwd=ROOT):
    return subprocess.run([sys.executable, "-m", "tinygen", *map(str, args)], cwd=cwd,
                          capture_output=True, text=True)


def emit_both(folder: Path) -> None:
    for i, (prefix, model, requant) in enumerate(MODELS):
        r = tinygen("emit", model, "-o", folder, "--prefix", prefix, "--requant", requant,
                    *(["--add"] if i else []))
        assert r.returncode == 0, r.stderr


@pytest.fixture(scope="module")
def program(tmp_path_factory):
    """(folder, main.c, expected printout): both models, SAMPLES samples each."""
    base = tmp_path_factory.mktemp("two")
    folder = base / "models"
    emit_both(folder)
    decls, body, expected = [PRINT_C], [], []
    for prefix, model, requant in MODELS:
        c = compile_model(str(model), BuildOptions(prefix=prefix, requant=requant))
        ins, outs = reference_io(c, samples_for(c, SAMPLES, seed=7))
        decls.append(f'#include "{prefix}.h"\n#include <string.h>\n')
        for s, (sample_in, sample_out) in enumerate(zip(ins, outs, strict=True)):
            for i, data in enumerate(sample_in):
                decls.append(c_bytes(f"{prefix}_in{s}_{i}", data))
                body.append(f"    memcpy({prefix}_input(NULL, {i}), {prefix}_in{s}_{i}, "
                            f"{len(data)}u);")
            body.append(f"    if ({prefix}_run(NULL, NULL, NULL) != 0) {{ return 1; }}")
            for o, data in enumerate(sample_out):
                body.append(f'    print_text("{prefix} {s} {o} ");')
                body.append(f"    print_hex({prefix}_output(NULL, {o}), {len(data)}u);")
                body.append('    print_text("\\n");')
                expected.append(f"{prefix} {s} {o} {data.hex()}")
    main = base / "main.c"
    main.write_text("".join(decls) + "\nint main(void)\n{\n" + "\n".join(body) +
                    "\n    return 0;\n}\n")
    return folder, main, expected


def snippet_sources(folder: Path, work: Path) -> list[Path]:
    """The sources the two make snippets list, taken once each ($(sort ...), as the
    snippets' own comment says)."""
    if shutil.which("make") is None:
        pytest.skip("make not installed")
    work.mkdir(parents=True, exist_ok=True)
    mk = work / "Makefile"
    mk.write_text(f"include {folder}/cam_sources.mk\ninclude {folder}/pump_sources.mk\n"
                  "SRCS := $(sort $(TG_CAM_SOURCES) $(TG_PUMP_SOURCES))\n"
                  "show:\n\t@echo $(SRCS)\n\t@echo $(TG_CAM_CFLAGS) $(TG_PUMP_CFLAGS)\n")
    out = subprocess.run(["make", "-s", "-f", str(mk), "show"], capture_output=True,
                         text=True, check=True).stdout.splitlines()
    sources = [Path(p) for p in out[0].split()]
    assert "-ffp-contract=off" in out[1].split()  # the folder's kernels do float requant
    names = [p.name for p in sources]
    assert len(names) == len(set(names)) and {"cam.c", "pump.c", "tg_fc.c"} <= set(names)
    return sources


def test_one_folder_one_set_of_kernels_covering_both(program):
    folder, _, _ = program
    config = (folder / "tg_config.h").read_text()
    assert "#define TG_WITH_FLOAT_REQUANT 1" in config  # pump needs it; cam runs with it
    assert "cam (--requant fixed), pump (--requant float)" in config
    names = sorted(p.name for p in folder.iterdir())
    assert names.count("tg_conv.c") == 1 and "cam.c" in names and "pump.c" in names


def test_both_models_bit_exact_in_one_host_program(program, tmp_path):
    folder, main, expected = program
    sources = snippet_sources(folder, tmp_path)
    out = run_host([main, *sources], [folder], tmp_path / "host")
    assert out.splitlines() == expected


@pytest.mark.target
def test_both_models_bit_exact_on_cortex_m4(program, tmp_path):
    from tinygen.errors import TinygenError
    from tinygen.harness.toolchain import find_toolchain
    try:
        find_toolchain()
    except TinygenError as exc:
        pytest.skip(exc.one_line())
    folder, main, expected = program
    sources = snippet_sources(folder, tmp_path)
    out = run_target([main, *sources], [folder], tmp_path / "m4", "cortex-m4")
    assert out.splitlines() == expected


def test_a_float_model_refuses_kernels_configured_without_float(program, tmp_path):
    """The failure the folder design prevents: pump.c built with a fixed-only tree's
    kernels (its tg_config.h turns float requantization off) must not compile."""
    folder, _, _ = program
    cam_only = tmp_path / "cam_only"
    r = tinygen("emit", CAM, "-o", cam_only, "--prefix", "cam")
    assert r.returncode == 0, r.stderr
    for name in ("pump.c", "pump.h"):
        shutil.copy2(folder / name, cam_only / name)
    from tinygen.harness.cbuild import STRICT_FLAGS, host_compiler
    build = subprocess.run([host_compiler(), *STRICT_FLAGS, f"-I{cam_only}", "-c",
                            str(cam_only / "pump.c"), "-o", str(tmp_path / "pump.o")],
                           capture_output=True, text=True)
    assert build.returncode != 0
    assert "needs kernels configured with TG_WITH_FLOAT_REQUANT 1" in build.stderr
    # ... and the folder's own configuration builds it
    build = subprocess.run([host_compiler(), *STRICT_FLAGS, f"-I{folder}", "-c",
                            str(folder / "pump.c"), "-o", str(tmp_path / "pump.o")],
                           capture_output=True, text=True)
    assert build.returncode == 0, build.stderr


def test_re_adding_a_model_keeps_the_folder_exact(tmp_path):
    folder = tmp_path / "models"
    emit_both(folder)
    r = tinygen("emit", PUMP, "-o", folder, "--prefix", "pump", "--requant", "fixed", "--add")
    assert r.returncode == 0, r.stderr
    assert "#define TG_WITH_FLOAT_REQUANT 0" in (folder / "tg_config.h").read_text()
    assert "-ffp-contract=off" not in (folder / "cam_sources.mk").read_text()
    # door_camera alone uses tg_eltwise (its residual Add); removing nothing it needs
    r = tinygen("emit", CAM, "-o", folder, "--prefix", "cam", "--add", "--json")
    assert r.returncode == 0, r.stderr
    assert '"models": ["cam", "pump"]' in r.stdout
    assert (folder / "tg_eltwise.c").exists()


@pytest.mark.parametrize("spoil", ["stranger", "old_kernel", "case"])
def test_add_refuses_a_folder_it_cannot_keep_exact(spoil, tmp_path):
    folder = tmp_path / "models"
    r = tinygen("emit", CAM, "-o", folder, "--prefix", "cam")
    assert r.returncode == 0, r.stderr
    prefix = "pump"
    if spoil == "stranger":
        (folder / "notes.txt").write_text("mine")
    elif spoil == "old_kernel":
        conv = folder / "tg_conv.c"
        conv.write_text(conv.read_text() + "\n/* an older kernel */\n")
    else:
        prefix = "CAM"
    before = {p.name: p.read_bytes() for p in folder.iterdir()}
    r = tinygen("emit", PUMP, "-o", folder, "--prefix", prefix, "--add")
    assert r.returncode == 2 and len(r.stderr.strip().splitlines()) == 1, r.stderr
    assert {p.name: p.read_bytes() for p in folder.iterdir()} == before


def test_both_models_from_the_cmake_snippets(program, tmp_path):
    if shutil.which("cmake") is None:
        pytest.skip("cmake not installed")
    folder, main, expected = program
    from tinygen.harness.cbuild import STRICT_FLAGS
    (tmp_path / "CMakeLists.txt").write_text(
        "cmake_minimum_required(VERSION 3.10)\nproject(two C)\n"
        f"include({folder}/cam_sources.cmake)\ninclude({folder}/pump_sources.cmake)\n"
        f"add_executable(app {main} ${{TG_CAM_SOURCES}} ${{TG_PUMP_SOURCES}})\n"
        "target_include_directories(app PRIVATE ${TG_CAM_INCLUDE_DIRS})\n"
        f"target_compile_options(app PRIVATE {' '.join(STRICT_FLAGS)})\n"
        "target_link_libraries(app m)\n")
    for cmd in (["cmake", "-S", tmp_path, "-B", tmp_path / "b"],
                ["cmake", "--build", tmp_path / "b"]):
        r = subprocess.run([str(c) for c in cmd], capture_output=True, text=True)
        assert r.returncode == 0, r.stdout[-2000:] + r.stderr[-2000:]
    ran = subprocess.run([str(tmp_path / "b" / "app")], capture_output=True, text=True)
    assert ran.returncode == 0 and ran.stdout.splitlines() == expected
