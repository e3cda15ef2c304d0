"""Benchmark of the diagonal-midrank kernels at GPT-2-small size (V = 50,257, dh = 64).

Not a test: it prints, in one run, the raw float32 matrix-multiply rate, the rate of the
full-block approach, the exact fp32 and bf16-checked rates and their ratios, the peak
memory of a scan of a synthetic GPT-2-small-sized model, and the ``plan`` estimates for
that model (exact and ``--until-ci 0.02``). Usage: ``scripts/bench [--quick]``.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch

from composition.score import ranks

V, DH = 50257, 64


def _machine() -> str:
    model = "unknown processor"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                model = line.split(":", 1)[1].strip()
                break
        flags = next(line for line in Path("/proc/cpuinfo").read_text().splitlines() if line.startswith("flags"))
        isa = [f for f in ("avx2", "fma", "avx512f", "avx512_bf16", "amx_bf16") if f" {f}" in flags]
    except (OSError, StopIteration):
        isa = []
    mem = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
    return (f"{model}, {os.cpu_count()} cores, {mem:.0f} GiB, ISA {'/'.join(isa) or '?'}, torch {torch.__version__}, "
            f"{torch.get_num_threads()} torch threads, load average {os.getloadavg()[0]:.1f}")


def _rate(fn, entries_per_call: float, seconds: float) -> float:
    fn()  # warm up
    calls, spent = 0, 0.0
    while spent < seconds:
        t = time.perf_counter()
        fn()
        spent += time.perf_counter() - t
        calls += 1
    return calls * entries_per_call / spent


def mm_rate(R32: torch.Tensor, seconds: float, dtype=torch.float32) -> float:
    """``[256, 64] x [64, 2048]`` tiles over the whole key matrix, preallocated output."""
    L = torch.randn(256, DH).to(dtype)
    Rt = R32.to(dtype).T.contiguous()  # [64, V]
    tiles = [Rt[:, c:c + 2048] for c in range(0, V - 2048 + 1, 2048)]
    out = torch.empty(256, 2048, dtype=dtype)

    def run():
        for t in tiles:
            torch.mm(L, t, out=out)
    return _rate(run, 256 * 2048 * len(tiles), seconds)


def full_block_rate(L32: torch.Tensor, R32: torch.Tensor, seconds: float) -> float:
    """The obvious approach: materialise a [256, V] block, compare with the diagonal, sum."""
    idx = torch.arange(256)

    def run():
        S = L32[:256] @ R32.T  # [256, V]
        d = S.gather(1, idx[:, None])
        (S > d).sum(1)
        (S == d).sum(1)
    return _rate(run, 256 * V, seconds)


def ours_rate(left, prep, rows: int, seconds: float) -> float:
    r = np.arange(rows)
    return _rate(lambda: ranks.midranks_batch([left], [prep], r), rows * V, seconds)


def write_gpt2_sized(directory: Path, seed: int = 0) -> Path:
    """A synthetic checkpoint with GPT-2-small sizes and random weights (GPT-2 layout)."""
    from safetensors.torch import save_file

    g = torch.Generator().manual_seed(seed)
    d, L, H, P = 768, 12, 12, 1024
    t = {"wte.weight": torch.randn(V, d, generator=g) * 0.14, "wpe.weight": torch.randn(P, d, generator=g) * 0.01}
    for i in range(L):
        p = f"h.{i}."
        t[p + "attn.c_attn.weight"] = torch.randn(d, 3 * d, generator=g) * 0.036
        t[p + "attn.c_attn.bias"] = torch.randn(3 * d, generator=g) * 0.02
        t[p + "attn.c_proj.weight"] = torch.randn(d, d, generator=g) * 0.036
        t[p + "attn.c_proj.bias"] = torch.randn(d, generator=g) * 0.02
        for ln in ("ln_1", "ln_2"):
            t[p + ln + ".weight"] = 1.0 + 0.02 * torch.randn(d, generator=g)
            t[p + ln + ".bias"] = 0.02 * torch.randn(d, generator=g)
        t[p + "mlp.c_fc.weight"] = torch.randn(d, 4 * d, generator=g) * 0.036
        t[p + "mlp.c_fc.bias"] = torch.randn(4 * d, generator=g) * 0.02
        t[p + "mlp.c_proj.weight"] = torch.randn(4 * d, d, generator=g) * 0.018
        t[p + "mlp.c_proj.bias"] = torch.randn(d, generator=g) * 0.02
    t["ln_f.weight"] = torch.ones(d)
    t["ln_f.bias"] = torch.zeros(d)
    directory.mkdir(parents=True, exist_ok=True)
    save_file({"transformer." + k: v.contiguous() for k, v in t.items()}, str(directory / "model.safetensors"))
    config = {"model_type": "gpt2", "architectures": ["GPT2LMHeadModel"], "vocab_size": V, "n_embd": d,
              "n_head": H, "n_layer": L, "n_positions": P, "n_ctx": P, "n_inner": None,
              "activation_function": "gelu_new", "layer_norm_epsilon": 1e-5,
              "note": "synthetic random weights with GPT-2-small sizes, for benchmarks only"}
    (directory / "config.json").write_text(json.dumps(config))
    return directory


_CHILD = r"""
import json, resource, sys, time
from composition.run.scan import ScanOptions, run_scan
opts = ScanOptions(**json.loads(sys.argv[3]))
t = time.perf_counter()
run_scan(sys.argv[1], sys.argv[2], opts, overwrite=True)
print(json.dumps({"seconds": time.perf_counter() - t,
                  "peak_bytes": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024}))
"""


def scan_in_child(model: Path, out: Path, options: dict) -> dict:
    """Run a scan in a fresh process and report its wall time and peak resident memory."""
    env = dict(os.environ, PYTHONPATH=str(Path(__file__).resolve().parents[1]) + os.pathsep
               + os.environ.get("PYTHONPATH", ""))
    res = subprocess.run([sys.executable, "-c", _CHILD, str(model), str(out), json.dumps(options)],
                         capture_output=True, text=True, env=env, check=True)
    return json.loads(res.stdout.strip().splitlines()[-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="shorter timings (noisier)")
    ap.add_argument("--skip-model", action="store_true", help="kernel rates only")
    args = ap.parse_args()
    sec = 1.5 if args.quick else 4.0
    print(f"# composition ranks benchmark, {_dt.date.today().isoformat()}")
    print(f"machine: {_machine()}")
    print(f"fused C kernel available: {ranks.kernel_available()}")
    g = torch.Generator().manual_seed(0)
    left = torch.randn(V, DH, generator=g, dtype=torch.float64)
    right = torch.randn(V, DH, generator=g, dtype=torch.float64)
    R32 = (right / right.norm(dim=1).max()).float()
    L32 = (left / left.norm(dim=1, keepdim=True)).float()
    prep32 = ranks.prepare_right(right, "fp32")
    prepb = ranks.prepare_right(right, "bf16-checked")
    rows = 4096 if args.quick else 8192
    print(f"\nG entries/s at V = {V}, dh = {DH} (Gaussian factors; entries = rows x V)")
    res = {}
    # interleave so slow drifts of the shared machine hit every figure alike
    res["mm"] = mm_rate(R32, sec)
    res["exact fp32"] = ours_rate(left, prep32, rows, sec)
    res["full block"] = full_block_rate(L32, R32, sec)
    res["bf16-checked"] = ours_rate(left, prepb, rows, sec)
    res["mm (again)"] = mm_rate(R32, sec)
    res["exact fp32 (again)"] = ours_rate(left, prep32, rows, sec)
    res["plain torch engine, fp32"] = _rate(
        lambda: ranks.midranks_batch([left], [ranks.prepare_right(right, "fp32", engine="torch")], np.arange(1024)),
        1024 * V, sec)
    res["mm bf16 tiles"] = mm_rate(R32, min(sec, 1.0), torch.bfloat16)
    threads = torch.get_num_threads()
    torch.set_num_threads(1)  # MKL's threads stall when other jobs share the cores
    res["mm, 1 thread"] = mm_rate(R32, sec)
    torch.set_num_threads(threads)
    res["exact fp32, 1 thread"] = _rate(lambda: ranks.midranks_batch([left], [prep32], np.arange(rows // 2), threads=1),
                                        rows // 2 * V, sec)
    for name, value in res.items():
        print(f"  {name:<28} {value / 1e9:7.3f}")
    mm = 0.5 * (res["mm"] + res["mm (again)"])
    fp32 = 0.5 * (res["exact fp32"] + res["exact fp32 (again)"])
    print("ratios")
    print(f"  exact fp32 / mm            {fp32 / mm:7.2f}   (target >= 0.85)")
    print(f"  same, one thread each      {res['exact fp32, 1 thread'] / res['mm, 1 thread']:7.2f}")
    print(f"  exact fp32 / full block    {fp32 / res['full block']:7.2f}")
    print(f"  bf16-checked / exact fp32  {res['bf16-checked'] / fp32:7.2f}   (target >= 2)")
    print(f"  bf16 mm / fp32 mm          {res['mm bf16 tiles'] / mm:7.2f}   (bf16 hardware?)")
    same = torch.equal(ranks.diagonal_midranks(left, prep32, rows=np.arange(512)),
                       ranks.diagonal_midranks(left, prepb, rows=np.arange(512)))
    print(f"  bf16-checked ranks == fp32 ranks on 512 rows: {same}")
    print(f"peak memory of this process so far: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 2**20:.2f} GiB")
    if args.skip_model:
        return
    from composition.run.plan import plan_scan
    from composition.run.scan import ScanOptions

    with tempfile.TemporaryDirectory() as tmp:
        model = write_gpt2_sized(Path(tmp) / "gpt2-sized")
        print("\nsynthetic GPT-2-small-sized model (12 layers x 12 heads, V = 50,257, d = 768, random weights)")
        for label, opts in (("exact, fp32", ScanOptions()), ("--until-ci 0.02", ScanOptions(until_ci=0.02))):
            p = plan_scan(model, opts, calibrate_seconds=3.0)
            print(f"\nplan ({label}):\n" + "\n".join("  " + line for line in p.describe().splitlines()))
        sample = dict(writers="0.0", responders="1", rows=4096)
        p = plan_scan(model, ScanOptions(**sample), calibrate_seconds=3.0)
        got = scan_in_child(model, Path(tmp) / "bench-scan.h5", sample)
        print(f"\nscan of writer 0.0 x every head of layer 1 (12 pairs, --rows 4096) in a fresh process:")
        print(f"  wall time {got['seconds']:.1f} s, plan said {p.total_seconds:.1f} s "
              f"(ratio {p.total_seconds / got['seconds']:.2f})")
        print(f"  peak memory {got['peak_bytes'] / 2**30:.2f} GiB (target <= 1.5), plan said "
              f"{p.peak_bytes / 2**30:.2f} GiB")


if __name__ == "__main__":
    main()
