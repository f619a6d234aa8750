"""Decode the dev set with the shipped model at its shipped generation settings.

    python sample_data/make_data.py        # writes build/dev_refs.tsv
    python sample_data/decode_devset.py    # writes sample_data/devset.tsv

Rows are decoded ONE AT A TIME (no padding), with model.generate and the
model's own generation_config (see sample_data/model/generation_config.json),
so every output is independent of batch composition.  `--check-batched N`
additionally decodes the first N rows in padded batches and reports how many
outputs differ from the unbatched ones.
"""

import argparse
import time
from pathlib import Path

import torch
from transformers import AutoModelForSeq2SeqLM, AutoTokenizer

HERE = Path(__file__).parent


def read_tsv(path):
    with open(path, encoding="utf-8") as f:
        header = f.readline().rstrip("\n").split("\t")
        return [dict(zip(header, line.rstrip("\n").split("\t"))) for line in f]


def clean(s: str) -> str:
    return " ".join(s.split())


@torch.no_grad()
def decode_one(model, tok, source: str) -> str:
    enc = tok(source, return_tensors="pt")
    out = model.generate(**enc)
    return clean(tok.decode(out[0], skip_special_tokens=True))


@torch.no_grad()
def decode_batch(model, tok, sources, batch_size=16):
    outs = []
    for i in range(0, len(sources), batch_size):
        enc = tok(sources[i: i + batch_size], return_tensors="pt", padding=True)
        gen = model.generate(**enc)
        outs += [clean(t) for t in tok.batch_decode(gen, skip_special_tokens=True)]
    return outs


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--model", default=str(HERE / "model"))
    ap.add_argument("--refs", default=str(HERE / "build" / "dev_refs.tsv"))
    ap.add_argument("--out", default=str(HERE / "devset.tsv"))
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--check-batched", type=int, default=0, metavar="N")
    args = ap.parse_args()
    torch.set_num_threads(args.threads)

    tok = AutoTokenizer.from_pretrained(args.model)
    model = AutoModelForSeq2SeqLM.from_pretrained(args.model).eval()
    print("generation settings:", model.generation_config.to_diff_dict())
    rows = read_tsv(args.refs)

    t0 = time.time()
    outputs = [decode_one(model, tok, r["source"]) for r in rows]
    print(f"decoded {len(rows)} rows one at a time in {time.time() - t0:.1f}s")

    with open(args.out, "w", encoding="utf-8") as f:
        f.write("id\tsource\treference\toutput\n")
        for r, o in zip(rows, outputs):
            fields = [r["id"], clean(r["source"]), clean(r["reference"]), o]
            assert all("\t" not in x and "\n" not in x for x in fields)
            f.write("\t".join(fields) + "\n")
    n_diff = sum(clean(r["reference"]) != o for r, o in zip(rows, outputs))
    print(f"wrote {args.out}: {len(rows)} rows, {n_diff} outputs differ from the reference")

    if args.check_batched:
        n = args.check_batched
        batched = decode_batch(model, tok, [r["source"] for r in rows[:n]])
        diff = [i for i in range(n) if batched[i] != outputs[i]]
        print(f"batched vs one-at-a-time on first {n} rows: {len(diff)} differ"
              + (f" (rows {[rows[i]['id'] for i in diff[:10]]})" if diff else ""))


if __name__ == "__main__":
    main()
