"""The built bundle as the LV2 reference tools see it (lilv-utils, lv2-dev, binutils)."""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import pytest
from lv2host import support

from liftmag.settings import settings_fields

pytestmark = [
    pytest.mark.plugin,
    pytest.mark.skipif(bool(support.skip_reason()), reason=support.skip_reason()),
]


@pytest.fixture
def env(bundle: Path, tmp_path: Path) -> dict[str, str]:
    return support.lv2_env(bundle.parent, tmp_path / "state")


def _lv2info(uri: str, env: dict[str, str]) -> str:
    return subprocess.run(["lv2info", uri], env=env, capture_output=True, text=True,
                          check=True).stdout


def test_lv2ls_lists_both_plugins(env: dict[str, str]) -> None:
    out = subprocess.run(["lv2ls"], env=env, capture_output=True, text=True, check=True).stdout
    assert support.URI_2CH in out.split()
    assert support.URI_4CH in out.split()


def test_lv2_validate_reports_no_errors(bundle: Path) -> None:
    files = sorted(str(p) for p in bundle.glob("*.ttl"))
    proc = subprocess.run(["lv2_validate", *files], capture_output=True, text=True)
    report = proc.stdout + proc.stderr
    # lv2_validate (sord_validate over the LV2 specification) prints "Found N errors".
    assert re.search(r"Found 0 errors", report), report
    assert proc.returncode == 0, report
    assert "error:" not in report, report


@pytest.mark.parametrize(("uri", "channels"), [(support.URI_2CH, 2), (support.URI_4CH, 4)])
def test_lv2info_shows_ports_ranges_and_latency(uri: str, channels: int,
                                                env: dict[str, str]) -> None:
    text = _lv2info(uri, env)
    indices = support.port_indices(uri, env)
    # lilv reports the latency port it found through lv2:designation lv2:latency.
    assert f"Has latency:       yes, reported by port {indices['latency']}" in text
    assert "http://lv2plug.in/ns/ext/state#interface" in text
    for c in range(channels):
        assert f"in_{c + 1}" in indices and f"out_{c + 1}" in indices
    ports = dict(re.findall(r"Port (\d+):(.*?)(?=\n\s*Port \d+:|\Z)", text, flags=re.S))
    # lilv reads the port groups (LV2 port groups extension) and each channel's designation;
    # the stereo group's are the extension's own left and right.
    for direction in ("in", "out"):
        for c in range(channels):
            body = ports[str(indices[f"{direction}_{c + 1}"])]
            assert f"Group:       {uri}#{direction}" in body, body
            designation = re.search(r"Designation: (\S+)", body).group(1)
            if channels == 2:
                side = ("left", "right")[c]
                assert designation == f"http://lv2plug.in/ns/ext/port-groups#{side}"
            else:
                assert designation.endswith(f"microphone-{c + 1}")
    for f in settings_fields():
        meta = f.metadata
        if not meta.get("lv2_port"):
            continue
        body = ports[str(indices[f.name])]
        assert "ControlPort" in body and "InputPort" in body
        lo = float(re.search(r"Minimum:\s*(\S+)", body).group(1))
        hi = float(re.search(r"Maximum:\s*(\S+)", body).group(1))
        if meta.get("choices"):
            assert (lo, hi) == (0.0, len(meta["choices"]) - 1)
            assert "enumeration" in body
        elif meta.get("minimum") is not None:
            # Ports where 0 stands for "not set" or the default reach down to 0.
            zero = meta.get("lv2_zero")
            expected_lo = min(meta["minimum"], 0.0) if zero else meta["minimum"]
            assert lo == pytest.approx(expected_lo) and hi == pytest.approx(meta["maximum"])
        else:  # a switch
            assert (lo, hi) == (0.0, 1.0) and "toggled" in body
    latency = ports[str(indices["latency"])]
    assert "OutputPort" in latency and "ControlPort" in latency


def test_every_port_is_documented(bundle: Path) -> None:
    ttl = support.ttl_module()
    for _, n, stem in ttl.PLUGINS:
        text = (bundle / f"{stem}.ttl").read_text()
        # One rdfs:comment per port, plus the plugin's own.
        assert text.count("rdfs:comment") == 2 * n + len(ttl.control_ports()) + 1 + 1
        # One lv2:symbol per port and per port group (input and output).
        assert text.count("lv2:symbol") == 2 * n + len(ttl.control_ports()) + 1 + 2
        assert "units:unit units:db" in text and "units:unit units:frame" in text


def test_turtle_parses_with_sordi(bundle: Path) -> None:
    if shutil.which("sordi") is None:
        pytest.skip("sordi (the sord RDF tool) is not installed")
    for path in bundle.glob("*.ttl"):
        proc = subprocess.run(["sordi", "-i", "turtle", "-o", "ntriples", str(path)],
                              capture_output=True, text=True)
        assert proc.returncode == 0 and "error" not in proc.stderr, proc.stderr


def test_links_libpython_through_an_rpath(bundle: Path) -> None:
    if shutil.which("readelf") is None:
        pytest.skip("readelf (binutils) is not installed")
    so = bundle / support.build_module().BINARY
    dynamic = subprocess.run(["readelf", "-d", str(so)], capture_output=True, text=True,
                             check=True).stdout
    info = support.build_module().read_build_info(bundle)
    needed = re.findall(r"\(NEEDED\)\s+Shared library: \[(.+?)\]", dynamic)
    assert any(n.startswith("libpython3") for n in needed), needed
    # ELF: DT_RPATH is searched before LD_LIBRARY_PATH (DT_RUNPATH would come after it).
    rpath = re.search(r"\(RPATH\)\s+Library rpath: \[(.+?)\]", dynamic)
    assert rpath is not None, dynamic
    assert info["libpython_dir"] in rpath.group(1).split(":")
    libs = [n for n in needed if n.startswith("libpython3")]
    assert (Path(info["libpython_dir"]) / libs[0]).exists()


def test_exports_only_the_lv2_entry_point(bundle: Path) -> None:
    if shutil.which("nm") is None:
        pytest.skip("nm (binutils) is not installed")
    so = bundle / support.build_module().BINARY
    out = subprocess.run(["nm", "-D", "--defined-only", str(so)], capture_output=True,
                         text=True, check=True).stdout
    exported = {line.split()[-1] for line in out.splitlines() if " T " in line}
    # LV2 core: a plugin library exports lv2_descriptor; cffi adds its module init.
    assert exported == {"lv2_descriptor", "PyInit__liftmag_lv2"}


def _header(folder: Path) -> Path:
    """The generated port header for this build's plugins and controls, in ``folder``."""
    from liftmag_lv2 import build_shim

    ttl = support.ttl_module()
    folder.mkdir(parents=True, exist_ok=True)
    (folder / build_shim.HEADER).write_text(build_shim.ports_header(
        "/opt/liftmag-env/bin/python", [(uri, n) for uri, n, _ in ttl.PLUGINS],
        ttl.control_ports(), ttl.STATE_KEY_URI, build_shim.BLOCK_FRAMES,
        build_shim.libpython_dir()))
    return folder


def test_shim_compiles_alone_with_every_warning_an_error(tmp_path: Path) -> None:
    import sysconfig

    from liftmag_lv2 import build_shim

    python_include = sysconfig.get_paths()["include"]
    command = ["gcc", "-fsyntax-only", "-std=gnu11", "-Wall", "-Wextra", "-Werror",
               f"-I{python_include}", str(build_shim.SHIM_SOURCE)]
    # Without the header the file cannot compile: the baked-in values live only there.
    bare = subprocess.run(command, capture_output=True, text=True)
    assert bare.returncode != 0 and build_shim.HEADER in bare.stderr, bare.stderr
    headers = _header(tmp_path / "include")
    proc = subprocess.run([*command[:-1], f"-I{headers}", command[-1]], capture_output=True,
                          text=True)
    assert proc.returncode == 0 and not proc.stderr, proc.stderr


PORT_PRINTER = r"""
#include <stdio.h>
#include "liftmag_ports.h"

int main(void)
{
#define LIFTMAG_CONTROL(symbol, offset) printf("%s %s %d\n", uri, symbol, first_control + offset);
#define LIFTMAG_PLUGIN(u, channels, first_input, first_output, control0, latency)          \
    {                                                                                      \
        const char *uri = u;                                                               \
        const int first_control = control0;                                                \
        for (int c = 0; c < channels; ++c) {                                               \
            printf("%s in_%d %d\n", uri, c + 1, first_input + c);                          \
            printf("%s out_%d %d\n", uri, c + 1, first_output + c);                        \
        }                                                                                  \
        LIFTMAG_CONTROLS                                                                   \
        printf("%s latency %d\n", uri, latency);                                           \
    }
    LIFTMAG_PLUGINS
    return 0;
}
"""


def test_generated_header_has_the_port_indices_lilv_reads(env: dict[str, str],
                                                          tmp_path: Path) -> None:
    headers = _header(tmp_path / "include")
    source, exe = tmp_path / "ports.c", tmp_path / "ports"
    source.write_text(PORT_PRINTER)
    subprocess.run(["gcc", "-Wall", "-Werror", f"-I{headers}", "-o", str(exe), str(source)],
                   check=True)
    lines = subprocess.run([str(exe)], capture_output=True, text=True,
                           check=True).stdout.splitlines()
    from_header: dict[str, dict[str, int]] = {}
    for line in lines:
        uri, symbol, index = line.split()
        from_header.setdefault(uri, {})[symbol] = int(index)
    # lilv (lv2info) reads the indices from the built bundle's TTL: the C side must use the
    # very same numbers for every port of both plugins.
    assert sorted(from_header) == sorted([support.URI_2CH, support.URI_4CH])
    for uri, indices in from_header.items():
        assert indices == support.port_indices(uri, env), uri
