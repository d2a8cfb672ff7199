"""Choice of PySCF's OpenBLAS kernel (clusterlab.blas).

Outside checks: OpenBLAS itself reports the kernel it loaded
(``OPENBLAS_VERBOSE=2`` prints ``Core: <name>``, OpenBLAS documentation,
"common practice"); the Haswell kernels need AVX2 and FMA (Intel 64 and
IA-32 Architectures Software Developer's Manual, Haswell microarchitecture
adds both; "common practice").
"""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from clusterlab.blas import cpu_flags, recommended_coretype


def test_recommended_coretype_needs_avx2_and_fma():
    assert recommended_coretype({"sse3", "avx", "avx2", "fma"}, "x86_64") == "Haswell"
    assert recommended_coretype({"avx2", "fma", "avx512f"}, "AMD64") == "Haswell"
    assert recommended_coretype({"sse3", "avx", "avx2"}, "x86_64") is None  # no FMA
    assert recommended_coretype({"avx", "fma"}, "x86_64") is None  # no AVX2
    assert recommended_coretype({"avx2", "fma"}, "aarch64") is None  # not x86


def test_cpu_flags_reads_first_flags_line(tmp_path):
    p = tmp_path / "cpuinfo"
    p.write_text("processor\t: 0\nmodel name\t: Test CPU\nflags\t\t: fpu sse3 avx2 fma\n"
                 "processor\t: 1\nflags\t\t: fpu\n")
    assert cpu_flags(str(p)) == {"fpu", "sse3", "avx2", "fma"}
    assert cpu_flags(str(tmp_path / "missing")) == set()


def _run(code: str, **env: str) -> subprocess.CompletedProcess:
    full = {k: v for k, v in os.environ.items() if k not in ("OPENBLAS_CORETYPE", "CLUSTERLAB_BLAS_TUNING")}
    full.update(env)
    return subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=full, timeout=120)


_REPORT = ("import os, clusterlab; s = clusterlab.blas_status(); "
           "print('ACTION', s['action'], s['coretype'] or '-'); "
           "print('ENV', os.environ.get('OPENBLAS_CORETYPE', '-'))")


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc/cpuinfo")
def test_import_loads_pyscf_blas_with_the_recommended_kernel():
    import platform

    want = recommended_coretype(cpu_flags(), platform.machine())
    out = _run(_REPORT, OPENBLAS_VERBOSE="2")
    assert out.returncode == 0, out.stderr
    lines = (out.stdout + out.stderr).splitlines()
    action = next(ln for ln in lines if ln.startswith("ACTION")).split()
    # the variable is restored: child processes and later libraries see none
    assert "ENV -" in lines
    cores = [ln.split(":", 1)[1].strip() for ln in lines if ln.startswith("Core:")]
    if want is None:
        assert action[1] == "unsupported-cpu"
    else:
        assert action[1:] == ["set", want]
        # OpenBLAS itself reports the kernel of the library loaded last (PySCF's)
        assert cores and cores[-1] == want


def test_user_setting_and_opt_out_are_respected():
    out = _run(_REPORT, OPENBLAS_CORETYPE="Prescott")
    assert "ACTION user Prescott" in out.stdout and "ENV Prescott" in out.stdout
    out = _run(_REPORT, CLUSTERLAB_BLAS_TUNING="off")
    assert "ACTION opted-out -" in out.stdout


def test_too_late_when_pyscf_came_first():
    out = _run("import pyscf; " + _REPORT)
    assert "ACTION too-late -" in out.stdout, out.stdout + out.stderr
