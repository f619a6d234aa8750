"""Side-by-side speed check of triage's scoring on this machine (``python -m benchmarks.bench``).

Builds, in memory and without download, an encoder-decoder of production translation size
(Marian layout: 6 + 6 layers, d_model 512, 8 heads, FFN 2048, vocabulary 60,000; random
weights, seeded) and a seeded synthetic dev set (source, reference and output ids; each
output shares with its reference a prefix of random length). In one process, interleaved
chunk by chunk so a busy machine slows every contender alike, it times:

- triage's scoring of reference and output for every row;
- a naive scorer: one row at a time, reference and output each in its own full forward
  pass, log_softmax over the whole vocabulary;
- transformers' generate with 4 beams on the same sources (end token suppressed until the
  batch's shortest target length, decoding stopped at its longest, so decoded lengths
  match the targets');
- a plain float32 matmul of the output projection's shape (the machine's rate).

The useful rate is the FLOPs of scoring every target once without padding (encoder once
per row; decoder and output projection per target token; 2*m*n*k per matmul, attention
included) over triage's time. A scale check scores 10,000 and 1,000 rows of a small model
in child processes and reports peak RSS and time per row.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import statistics
import subprocess
import sys
import time
from collections.abc import Sequence
from pathlib import Path
from typing import Any

PROD = dict(d_model=512, layers=6, heads=8, ffn=2048, vocab=60000)
SMALL = dict(d_model=128, layers=3, heads=4, ffn=256, vocab=300)
SAMPLE_MODEL = Path(__file__).resolve().parent.parent / "sample_data" / "model"


# ---------------------------------------------------------------------------- FLOP count
def row_flops(config: Any, source_len: int, target_lens: Sequence[int]) -> int:
    """FLOPs (2*m*n*k per matmul, attention included) of one source and its targets, no padding.

    The encoder runs once; each target (length = scored tokens) runs the decoder and the
    output projection at each of its positions; cross-attention keys and values are
    computed per target, as a plain forward pass does.
    """
    d = config.d_model
    s = source_len
    enc = config.encoder_layers * (8 * s * d * d + 4 * s * s * d + 4 * s * d * config.encoder_ffn_dim)
    total = enc
    for t in target_lens:
        layer = (8 * t * d * d + 4 * t * t * d          # self-attention: q, k, v, out; scores, values
                 + 4 * t * d * d + 4 * s * d * d        # cross-attention: q, out; k, v of the source
                 + 4 * t * s * d                        # cross-attention scores and values
                 + 4 * t * d * config.decoder_ffn_dim)  # feed-forward
        total += config.decoder_layers * layer + 2 * t * d * config.vocab_size
    return total


# ---------------------------------------------------------------------------- model and data
def build_model(size: dict[str, int], seed: int = 0, max_positions: int = 512):
    """A Marian-layout model with random seeded weights, wrapped for triage."""
    import torch
    from tokenizers import Tokenizer, models
    from transformers import MarianConfig, MarianMTModel, PreTrainedTokenizerFast

    from triage.models.transformers_backend import TransformersModel

    torch.manual_seed(seed)
    cfg = MarianConfig(
        vocab_size=size["vocab"], d_model=size["d_model"], encoder_layers=size["layers"],
        decoder_layers=size["layers"], encoder_attention_heads=size["heads"],
        decoder_attention_heads=size["heads"], encoder_ffn_dim=size["ffn"], decoder_ffn_dim=size["ffn"],
        max_position_embeddings=max_positions, pad_token_id=0, eos_token_id=1, decoder_start_token_id=0,
        forced_eos_token_id=None,
    )
    model = MarianMTModel(cfg).eval()
    gc = model.generation_config
    gc.forced_eos_token_id, gc.bad_words_ids, gc.max_length, gc.num_beams = None, None, None, 4
    vocab = {"<pad>": 0, "</s>": 1, "<unk>": 2}
    tok = PreTrainedTokenizerFast(tokenizer_object=Tokenizer(models.WordLevel(vocab=vocab, unk_token="<unk>")),
                                  pad_token="<pad>", eos_token="</s>", unk_token="<unk>")
    return TransformersModel(model, tok)


def synthetic_rows(n: int, vocab: int, seed: int = 0, lo: int = 5, hi: int = 60, first_id: int = 3):
    """(source, reference, output) id lists; output = reference[:p] + other tokens, p ~ U{0..len(ref)}."""
    import torch

    g = torch.Generator().manual_seed(seed)

    def randint(a: int, b: int) -> int:  # inclusive
        return int(torch.randint(a, b + 1, (1,), generator=g))

    def ids(k: int) -> list[int]:
        return torch.randint(first_id, vocab, (k,), generator=g).tolist()

    rows = []
    for _ in range(n):
        s = randint(lo, hi)
        r = min(hi, max(lo, s + randint(-6, 6)))
        p = randint(0, r)
        o = max(p, min(hi, max(lo, r + randint(-6, 6))))
        ref = ids(r)
        rows.append((ids(s), ref, ref[:p] + ids(o - p)))
    return rows


def _settings(model):
    from triage.settings import DecoderSettings

    return DecoderSettings(beam=4, alpha=1.0, max_new_tokens=64, eos_token_ids=(model.end_id,),
                           pad_token_id=model.pad_id, origin="bench")


# ---------------------------------------------------------------------------- contenders
def run_tool(model, settings, rows, token_budget: int = 4096):
    from triage.scoring.scorer import ScoreRequest, score_requests

    reqs = [ScoreRequest(src, [ref, out]) for src, ref, out in rows]
    t0 = time.perf_counter()
    res = score_requests(model, settings, reqs, token_budget=token_budget)
    return time.perf_counter() - t0, [[x.logprob_sum for x in r] for r in res]


def run_naive(model, rows):
    import torch

    hf = model.model
    sums = []
    t0 = time.perf_counter()
    with torch.inference_mode():
        for src, ref, out in rows:
            row = []
            for tgt in (ref, out):
                labels = torch.tensor([tgt + [model.end_id]])
                dec = torch.tensor([[model.start_id] + tgt])
                logits = hf(input_ids=torch.tensor([src]), decoder_input_ids=dec).logits
                logp = torch.log_softmax(logits, dim=-1)
                row.append(float(logp.gather(-1, labels.unsqueeze(-1)).sum()))
            sums.append(row)
    return time.perf_counter() - t0, sums


def _padded(rows, pad_id: int):
    """Right-padded ids [B, S] and their attention mask, as generate takes them."""
    import torch

    width = max(len(r) for r in rows)
    ids = torch.full((len(rows), width), pad_id, dtype=torch.long)
    mask = torch.zeros((len(rows), width), dtype=torch.long)
    for i, r in enumerate(rows):
        ids[i, : len(r)] = torch.tensor(r, dtype=torch.long)
        mask[i, : len(r)] = 1
    return ids, mask


def run_generate(model, rows, batch: int = 16):
    """generate(num_beams=4) on the sources, batches of `batch` length-sorted rows.

    Random weights give no natural stopping point, so every row decodes exactly the batch's
    mean reference length + 1 tokens (min_new_tokens = max_new_tokens: the end token is
    suppressed until then); returns (seconds, generated tokens).
    """
    import torch

    hf = model.model
    order = sorted(range(len(rows)), key=lambda i: len(rows[i][1]))
    made = 0
    t0 = time.perf_counter()
    with torch.inference_mode():
        for a in range(0, len(order), batch):
            idx = order[a : a + batch]
            ids, mask = _padded([rows[i][0] for i in idx], model.pad_id)
            n_new = round(sum(len(rows[i][1]) + 1 for i in idx) / len(idx))
            out = hf.generate(input_ids=ids, attention_mask=mask, num_beams=4, do_sample=False,
                              min_new_tokens=n_new, max_new_tokens=n_new, length_penalty=1.0,
                              early_stopping=False)
            made += int((out[:, 1:] != model.pad_id).sum())
    return time.perf_counter() - t0, made


def matmul_rate(d: int, vocab: int, m: int = 512, reps: int = 3) -> list[float]:
    """GFLOP/s of plain float32 torch.matmul [m, d] x [d, vocab] (the output projection's shape)."""
    import torch

    g = torch.Generator().manual_seed(1)
    x = torch.randn(m, d, generator=g)
    w = torch.randn(d, vocab, generator=g)
    torch.matmul(x, w)
    rates = []
    for _ in range(reps):
        t0 = time.perf_counter()
        torch.matmul(x, w)
        rates.append(2 * m * d * vocab / (time.perf_counter() - t0) / 1e9)
    return rates


# ---------------------------------------------------------------------------- scale check
def _peak_rss_mb(resource) -> float:
    """Peak resident set of this process. VmHWM belongs to the process image; ru_maxrss (the
    fallback) also counts the parent's size at fork time, which would charge the bench's big model."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def _scale_worker(n: int, model_dir: str) -> None:
    import resource

    import torch

    from triage.scoring.scorer import ScoreRequest, score_requests

    if model_dir:
        from triage.models.transformers_backend import load_transformers_model

        model = load_transformers_model(model_dir)
        hi = min(60, (model.max_target_tokens or 62) - 2)
        desc = f"sample model {model_dir}"
    else:
        model = build_model(SMALL, seed=0, max_positions=128)
        hi = 60
        desc = "in-memory Marian d_model 128, 3+3 layers, FFN 256, vocab 300"
    first = max(model.start_id, model.end_id, model.pad_id, model.unk_id or 0) + 1
    rows = synthetic_rows(n, model.vocab_size, seed=7, hi=hi, first_id=first)
    settings = _settings(model)
    reqs = [ScoreRequest(src, [ref, out]) for src, ref, out in rows]
    score_requests(model, settings, reqs[:16])  # warm-up, not timed
    kept = []
    t0 = time.perf_counter()
    for a in range(0, n, 256):  # chunks as the pipeline scores them
        kept.extend(score_requests(model, settings, reqs[a : a + 256]))
    seconds = time.perf_counter() - t0
    assert len(kept) == n
    rss_mb = _peak_rss_mb(resource)
    print(json.dumps({"rows": n, "seconds": seconds, "rss_mb": rss_mb, "model": desc,
                      "threads": torch.get_num_threads()}))


def scale_check(n_big: int = 10_000, n_small: int = 1_000, threads: int | None = None) -> dict[str, Any]:
    model_dir = str(SAMPLE_MODEL) if (SAMPLE_MODEL / "config.json").is_file() else ""
    out: dict[str, Any] = {}
    runs = [("small1", n_small), ("big", n_big), ("small2", n_small)]  # small runs around the big one
    for key, n in runs:
        cmd = [sys.executable, "-m", "benchmarks.bench", "--scale-worker", str(n), "--scale-model", model_dir]
        if threads:
            cmd += ["--threads", str(threads)]
        proc = subprocess.run(cmd, capture_output=True, text=True, check=False)
        if proc.returncode != 0:
            raise RuntimeError(f"scale worker for {n} rows failed: {proc.stderr.strip().splitlines()[-1:]}")
        out[key] = json.loads(proc.stdout.strip().splitlines()[-1])
    big = out["big"]
    small = {"seconds": (out["small1"]["seconds"] + out["small2"]["seconds"]) / 2,
             "rss_mb": max(out["small1"]["rss_mb"], out["small2"]["rss_mb"])}
    return {
        "model": big["model"],
        "rows_small": n_small, "rows_big": n_big,
        "ms_per_row_small_runs": [1000 * out[k]["seconds"] / n_small for k in ("small1", "small2")],
        "ms_per_row_small": 1000 * small["seconds"] / n_small,
        "ms_per_row_big": 1000 * big["seconds"] / n_big,
        "rss_small_mb": small["rss_mb"], "rss_big_mb": big["rss_mb"],
    }


# ---------------------------------------------------------------------------- main
def run(rows_n: int = 256, chunk: int = 64, quick: bool = False, size: dict[str, int] | None = None,
        token_budget: int = 4096, threads: int | None = None, log=print) -> dict[str, Any]:
    import torch

    from triage.scoring.scorer import ScoreRequest, _fast_path_usable

    if threads:
        torch.set_num_threads(threads)
    size = size or PROD
    model = build_model(size, seed=0)
    cfg = model.model.config
    rows = synthetic_rows(rows_n, model.vocab_size, seed=0)
    settings = _settings(model)
    if not _fast_path_usable(model, settings, [ScoreRequest(rows[0][0], [rows[0][1]])], {0: [None]}):
        raise RuntimeError("the bench settings carry generation rules: the prefix-tree path would not run")
    log(f"triage bench: torch {torch.__version__}, {torch.get_num_threads()} threads, {platform.processor() or platform.machine()}, "
        f"{os.cpu_count()} CPUs visible")
    log(f"model: Marian layout {cfg.encoder_layers}+{cfg.decoder_layers} layers, d_model {cfg.d_model}, "
        f"{cfg.encoder_attention_heads} heads, FFN {cfg.encoder_ffn_dim}, vocab {cfg.vocab_size}, random weights (seed 0)")
    shared = sum(next((k for k, (a, b) in enumerate(zip(r, o, strict=False)) if a != b), min(len(r), len(o)))
                 for _, r, o in rows)
    tgt_tokens = sum(len(r) + len(o) + 2 for _, r, o in rows)
    log(f"dev set: {rows_n} rows, source/target lengths 5-60, {tgt_tokens} target tokens, "
        f"{shared} shared-prefix tokens; interleaved in chunks of {chunk} rows")

    # warm-up (not timed): first calls allocate, check the output head, build kernels
    warm = rows[:2]
    run_tool(model, settings, warm)
    run_naive(model, warm[:1])
    run_generate(model, warm[:1])

    t_tool = t_naive = t_gen = 0.0
    gen_tokens = 0
    rates: list[float] = []
    chunks: list[dict[str, float]] = []
    tool_sums: list[list[float]] = []
    naive_sums: list[list[float]] = []
    for a in range(0, rows_n, chunk):
        part = rows[a : a + chunk]
        before = matmul_rate(cfg.d_model, cfg.vocab_size)
        dt_tool, sums = run_tool(model, settings, part, token_budget)
        tool_sums += sums
        dt_naive, sums = run_naive(model, part)
        naive_sums += sums
        dt_gen, made = run_generate(model, part)
        after = matmul_rate(cfg.d_model, cfg.vocab_size)
        rates += before + after
        t_tool, t_naive, t_gen, gen_tokens = t_tool + dt_tool, t_naive + dt_naive, t_gen + dt_gen, gen_tokens + made
        useful_part = sum(row_flops(cfg, len(s), [len(r) + 1, len(o) + 1]) for s, r, o in part)
        near = statistics.median(before + after)
        chunks.append({"tool_s": dt_tool, "naive_s": dt_naive, "generate_s": dt_gen, "matmul_gflops": near,
                       "naive_ratio": dt_naive / dt_tool, "generate_ratio": dt_tool / dt_gen,
                       "roofline_share": useful_part / dt_tool / 1e9 / near})
        c = chunks[-1]
        log(f"  chunk {len(chunks)} ({len(part)} rows): triage {dt_tool:.1f}s  naive {dt_naive:.1f}s  "
            f"generate {dt_gen:.1f}s  matmul {near:.0f} GFLOP/s -> naive {c['naive_ratio']:.2f}x  "
            f"generate {c['generate_ratio']:.2f}x  matmul share {100 * c['roofline_share']:.0f}%")
    rate = statistics.median(rates)
    useful = sum(row_flops(cfg, len(s), [len(r) + 1, len(o) + 1]) for s, r, o in rows)
    useful_rate = useful / t_tool / 1e9
    agree = max(abs(x - y) for a, b in zip(tool_sums, naive_sums, strict=True) for x, y in zip(a, b, strict=True))
    ref_tokens = sum(len(r) + 1 for _, r, _ in rows)

    def med(key: str) -> float:
        return statistics.median(c[key] for c in chunks)

    res: dict[str, Any] = {
        "torch": torch.__version__, "threads": torch.get_num_threads(), "rows": rows_n, "chunk_rows": chunk,
        "matmul_gflops": rate, "matmul_gflops_min": min(rates), "matmul_gflops_max": max(rates),
        "tool_s": t_tool, "naive_s": t_naive, "generate_s": t_gen,
        "useful_gflop": useful / 1e9, "useful_gflops": useful_rate,
        # headline figures: median over the interleaved chunks (a burst of load on the shared
        # machine then spoils one chunk, not the figure); whole-run totals beside them
        "naive_ratio": med("naive_ratio"), "generate_ratio": med("generate_ratio"),
        "roofline_share": med("roofline_share"),
        "naive_ratio_total": t_naive / t_tool, "generate_ratio_total": t_tool / t_gen,
        "roofline_share_total": useful_rate / rate,
        "max_abs_diff_vs_naive": agree, "generated_tokens": gen_tokens, "reference_tokens": ref_tokens,
        "target_tokens": tgt_tokens, "chunks": chunks,
    }
    log(f"matmul   float32 [512x{cfg.d_model}]x[{cfg.d_model}x{cfg.vocab_size}]: {rate:.1f} GFLOP/s "
        f"(median of {len(rates)}, range {min(rates):.1f}-{max(rates):.1f})")
    log(f"triage   scoring, reference + output per row: {t_tool:.2f} s ({1000 * t_tool / rows_n:.0f} ms/row); "
        f"useful {useful / 1e9:.0f} GFLOP -> {useful_rate:.1f} GFLOP/s; share of the matmul rate "
        f"{100 * res['roofline_share']:.0f}% (chunk median; whole run {100 * res['roofline_share_total']:.0f}%)")
    log(f"naive    one row, one target per forward, log_softmax: {t_naive:.2f} s -> triage {res['naive_ratio']:.2f}x "
        f"faster (chunk median; whole run {res['naive_ratio_total']:.2f}x); max |difference| of log-prob sums {agree:.1e}")
    log(f"generate num_beams=4, batches of 16, each row decoding its batch's mean reference length "
        f"({gen_tokens} tokens generated, {ref_tokens} reference tokens): {t_gen:.2f} s -> triage takes "
        f"{res['generate_ratio']:.2f}x its time (chunk median; whole run {res['generate_ratio_total']:.2f}x)")
    if quick:
        res["rss_10k_mb"] = None
        res["per_row_ratio_10k_1k"] = None
        return res
    sc = scale_check(threads=threads)
    res.update(scale=sc, rss_10k_mb=sc["rss_big_mb"], per_row_ratio_10k_1k=sc["ms_per_row_big"] / sc["ms_per_row_small"])
    log(f"scale    {sc['model']}: 10,000 rows {sc['ms_per_row_big']:.2f} ms/row, peak RSS {sc['rss_big_mb']:.0f} MB; "
        f"1,000 rows {sc['ms_per_row_small']:.2f} ms/row (mean of a run before and after: "
        f"{sc['ms_per_row_small_runs'][0]:.2f}, {sc['ms_per_row_small_runs'][1]:.2f}; RSS {sc['rss_small_mb']:.0f} MB); "
        f"ratio {res['per_row_ratio_10k_1k']:.2f}")
    return res


def main(argv: Sequence[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="triage bench", description="Time triage's scoring against a naive scorer, "
                                 "4-beam generate and the machine's matmul rate, side by side.")
    ap.add_argument("--json", action="store_true", help="print one JSON object instead of lines")
    ap.add_argument("--quick", action="store_true", help="skip the 10,000-row scale check")
    ap.add_argument("--rows", type=int, default=256, help="dev-set rows (default 256)")
    ap.add_argument("--chunk", type=int, default=64, help="rows per interleaved chunk (default 64)")
    ap.add_argument("--token-budget", type=int, default=4096, help="scoring batch size in target tokens")
    ap.add_argument("--threads", type=int, default=None, help="torch threads (default: torch's choice)")
    ap.add_argument("--small", action="store_true", help="use the small model (d_model 128) for the side-by-side run")
    ap.add_argument("--scale-worker", type=int, default=None, help=argparse.SUPPRESS)
    ap.add_argument("--scale-model", default="", help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.threads:
        import torch

        torch.set_num_threads(a.threads)
    if a.scale_worker is not None:
        _scale_worker(a.scale_worker, a.scale_model)
        return 0
    log = (lambda *_: None) if a.json else (lambda s: print(s, flush=True))
    res = run(rows_n=a.rows, chunk=a.chunk, quick=a.quick, size=SMALL if a.small else None,
              token_budget=a.token_budget, threads=a.threads, log=log)
    if a.json:
        print(json.dumps(res))
    return 0


if __name__ == "__main__":
    sys.exit(main())
