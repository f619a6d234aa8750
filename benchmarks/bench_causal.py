"""Scoring a decoder-only model: triage's scorer (one prompt pass per row, its key/value cache shared
by the row's targets, the prefix tree, projection only where needed) against the naive way (one
full forward pass of prompt + target per target, log_softmax, gather), side by side in one run,
on a random Llama-layout model (grouped-query attention) of a size set by the flags.

    python -m benchmarks.bench_causal [--rows N] [--prompt P] [--target T] [--refs R] [--repeat K]

Prints the median time of each and their ratio, and the largest difference between the two
paths' token log-probs (they must agree within 1e-5).
"""

from __future__ import annotations

import argparse
import statistics
import time

import torch


def build(vocab: int, d_model: int, layers: int, seed: int = 0):
    from tokenizers import Tokenizer, models, pre_tokenizers
    from transformers import LlamaConfig, LlamaForCausalLM, PreTrainedTokenizerFast

    torch.manual_seed(seed)
    cfg = LlamaConfig(vocab_size=vocab, hidden_size=d_model, intermediate_size=4 * d_model, num_hidden_layers=layers,
                      num_attention_heads=8, num_key_value_heads=2, max_position_embeddings=1024,
                      bos_token_id=1, eos_token_id=2, pad_token_id=0, tie_word_embeddings=False)
    hf = LlamaForCausalLM(cfg).eval()
    tok = Tokenizer(models.WordLevel(vocab={f"w{i}": i for i in range(vocab)}, unk_token="w3"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    fast = PreTrainedTokenizerFast(tokenizer_object=tok, pad_token="w0", bos_token="w1", eos_token="w2",
                                   unk_token="w3")
    from triage.models.causal_backend import CausalModel

    return CausalModel(hf, fast)


def requests(m, rows: int, prompt: int, target: int, refs: int, seed: int = 1):
    from triage.scoring.scorer import ScoreRequest

    g = torch.Generator().manual_seed(seed)

    def rand(n):
        return torch.randint(4, m.vocab_size, (n,), generator=g).tolist()

    out = []
    for _ in range(rows):
        p = rand(int(prompt * (0.5 + torch.rand(1, generator=g).item())))
        ref = rand(target)
        targets = [ref] + [ref[: target // 2] + rand(target - target // 2) for _ in range(refs - 1)]
        targets.append(ref[: target // 3] + rand(target - target // 3))  # the output
        out.append(ScoreRequest(p, targets))
    return out


@torch.inference_mode()
def naive(m, reqs):
    """One full forward of prompt + target per target."""
    out = []
    for r in reqs:
        row = []
        for t in r.targets:
            labels = t + [m.end_id]
            ids = torch.tensor([r.source_ids + labels[:-1]])
            logp = torch.log_softmax(m.model(input_ids=ids).logits[0].float(), -1)
            row.append([float(logp[len(r.source_ids) - 1 + k, x]) for k, x in enumerate(labels)])
        out.append(row)
    return out


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--rows", type=int, default=48)
    p.add_argument("--prompt", type=int, default=48, help="mean prompt tokens (0.5x to 1.5x)")
    p.add_argument("--target", type=int, default=20)
    p.add_argument("--refs", type=int, default=2, help="references per row (plus the output)")
    p.add_argument("--vocab", type=int, default=32000)
    p.add_argument("--d-model", type=int, default=256)
    p.add_argument("--layers", type=int, default=4)
    p.add_argument("--repeat", type=int, default=3)
    p.add_argument("--threads", type=int, default=None)
    a = p.parse_args(argv)
    if a.threads:
        torch.set_num_threads(a.threads)
    from triage.models.describe import model_settings
    from triage.scoring.scorer import score_requests

    m = build(a.vocab, a.d_model, a.layers)
    settings = model_settings(m, beam=4, alpha=1.0, max_new_tokens=a.target + 1)
    reqs = requests(m, a.rows, a.prompt, a.target, a.refs)
    fast_t, naive_t = [], []
    for _ in range(a.repeat):  # interleaved, so a change in machine load hits both
        t0 = time.perf_counter()
        got = score_requests(m, settings, reqs)
        fast_t.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        want = naive(m, reqs)
        naive_t.append(time.perf_counter() - t0)
    diff = max(abs(a_ - b_) for gr, wr in zip(got, want, strict=True) for g, w in zip(gr, wr, strict=True)
               for a_, b_ in zip(g.logprobs, w, strict=True))
    f, n = statistics.median(fast_t), statistics.median(naive_t)
    targets = sum(len(r.targets) for r in reqs)
    print(f"decoder-only scoring, {a.rows} rows x {a.refs + 1} targets ({targets}), prompts ~{a.prompt} tokens, "
          f"targets {a.target}, vocab {a.vocab}, d_model {a.d_model}, {a.layers} layers, "
          f"{torch.get_num_threads()} threads")
    print(f"  triage scorer   {f:8.3f} s (median of {a.repeat})")
    print(f"  naive forward   {n:8.3f} s")
    print(f"  ratio           {n / f:8.2f}x faster; largest log-prob difference {diff:.2e}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
