"""Measure the search/model mix of the shipped dev set under the shipped model.

    python sample_data/check_mix.py [--verify 5] [--json build/mix.json]

For every row whose output differs from the reference (whitespace-normalised)
both strings are force-scored with the model's own forward pass:

    labels   = tokenizer(text_target=...)  (the tokenizer appends </s>)
    logprob  = -(loss * n_tokens)          (no label smoothing)
    score    = logprob / n_tokens ** length_penalty

with n_tokens counting </s> but not the decoder start token and
length_penalty taken from the model's generation_config (beam search's
sequences_scores convention).  ref_score > out_score -> "search"
(the model prefers the reference, the beam missed it), otherwise "model".

`--verify N` re-generates N dev rows with return_dict_in_generate and checks
that the forced score of the generated ids equals generate's sequences_scores.
"""

import argparse
import json
import time
from pathlib import Path

import torch
from transformers import AutoModelForSeq2SeqLM, AutoTokenizer

HERE = Path(__file__).parent
BUCKETS = [("1-10", 1, 10), ("11-20", 11, 20), ("21-30", 21, 30), ("31-40", 31, 40),
           ("41+", 41, 10_000)]


def read_tsv(path):
    with open(path, encoding="utf-8") as f:
        header = f.readline().rstrip("\n").split("\t")
        return [dict(zip(header, line.rstrip("\n").split("\t"))) for line in f]


def norm(s: str) -> str:
    return " ".join(s.split())


def bucket(n_words: int) -> str:
    return next(name for name, lo, hi in BUCKETS if lo <= n_words <= hi)


@torch.no_grad()
def logprob_of_ids(model, enc, label_ids):
    labels = torch.tensor([label_ids])
    loss = model(**enc, labels=labels).loss
    return -(loss.item() * len(label_ids))


@torch.no_grad()
def score(model, tok, source, target, alpha):
    enc = tok(source, return_tensors="pt")
    ids = tok(text_target=target)["input_ids"]
    return logprob_of_ids(model, enc, ids) / len(ids) ** alpha


@torch.no_grad()
def verify(model, tok, rows, n, alpha):
    worst = 0.0
    for r in rows[:n]:
        enc = tok(r["source"], return_tensors="pt")
        g = model.generate(**enc, return_dict_in_generate=True, output_scores=True)
        seq = g.sequences[0].tolist()
        assert seq[0] == model.config.decoder_start_token_id
        ids = seq[1:]
        while ids and ids[-1] == model.config.pad_token_id:
            ids.pop()
        forced = logprob_of_ids(model, enc, ids) / len(ids) ** alpha
        gen_score = g.sequences_scores[0].item()
        text_ids = tok(text_target=tok.decode(ids, skip_special_tokens=True))["input_ids"]
        worst = max(worst, abs(forced - gen_score))
        print(f"  {r['id']}: sequences_scores {gen_score:.6f} forced {forced:.6f} "
              f"|diff| {abs(forced - gen_score):.2e}  re-tokenised ids identical: {text_ids == ids}")
    print(f"verify: max |forced - sequences_scores| = {worst:.2e}")
    return worst


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--model", default=str(HERE / "model"))
    ap.add_argument("--data", default=str(HERE / "devset.tsv"))
    ap.add_argument("--verify", type=int, default=0, metavar="N")
    ap.add_argument("--json", default=None)
    ap.add_argument("--threads", type=int, default=2)
    args = ap.parse_args()
    torch.set_num_threads(args.threads)

    tok = AutoTokenizer.from_pretrained(args.model)
    model = AutoModelForSeq2SeqLM.from_pretrained(args.model).eval()
    gc = model.generation_config
    alpha = gc.length_penalty if gc.num_beams and gc.num_beams > 1 else 0.0
    rows = read_tsv(args.data)
    print(f"model {args.model}: num_beams={gc.num_beams} length_penalty={gc.length_penalty} "
          f"(alpha used {alpha}); dev rows {len(rows)}")

    t0 = time.time()
    names = [b[0] for b in BUCKETS]
    per_bucket = {b: {"rows": 0, "failed": 0, "search": 0, "model": 0} for b in names}
    verdicts = []
    for r in rows:
        b = bucket(len(norm(r["reference"]).split()))
        per_bucket[b]["rows"] += 1
        if norm(r["output"]) == norm(r["reference"]):
            continue
        rs = score(model, tok, r["source"], norm(r["reference"]), alpha)
        os_ = score(model, tok, r["source"], norm(r["output"]), alpha)
        v = "search" if rs > os_ else "model"
        per_bucket[b]["failed"] += 1
        per_bucket[b][v] += 1
        verdicts.append({"id": r["id"], "bucket": b, "ref_score": rs, "out_score": os_, "verdict": v})
    el = time.time() - t0

    n_fail = len(verdicts)
    n_search = sum(v["verdict"] == "search" for v in verdicts)
    n_model = n_fail - n_search
    print(f"scored {n_fail} failed rows in {el:.1f}s")
    print(f"failed {n_fail}/{len(rows)} ({n_fail / len(rows):.1%}); "
          f"search {n_search} ({n_search / max(n_fail, 1):.1%}), "
          f"model {n_model} ({n_model / max(n_fail, 1):.1%})")
    print(f"{'bucket':>7} {'rows':>5} {'failed':>6} {'search':>6} {'model':>6}")
    for b in names:
        d = per_bucket[b]
        print(f"{b:>7} {d['rows']:5d} {d['failed']:6d} {d['search']:6d} {d['model']:6d}")
    ok = (n_fail >= 60 and n_search >= 0.15 * n_fail and n_model >= 0.15 * n_fail
          and sum(per_bucket[b]["failed"] > 0 for b in names) >= 4)
    print("demo requirements met:", ok)

    worst = verify(model, tok, rows, args.verify, alpha) if args.verify else None
    if args.json:
        Path(args.json).write_text(json.dumps({
            "rows": len(rows), "failed": n_fail, "search": n_search, "model": n_model,
            "buckets": per_bucket, "verify_max_abs_diff": worst, "verdicts": verdicts,
        }, indent=1))


if __name__ == "__main__":
    main()
