"""Train the small announcement model shipped in sample_data/model/.

One command, CPU only, fixed seeds:

    python sample_data/make_data.py
    python sample_data/train_model.py

Steps:
  1. train a BPE tokenizer (digits split one by one, shared source/target
     vocabulary) with the `tokenizers` library and wrap it as a
     PreTrainedTokenizerFast so AutoTokenizer can load it;
  2. build a small MarianMTModel (d_model 128, 3+3 layers, FFN 256);
  3. plain PyTorch loop: AdamW, linear warm-up then linear decay,
     token-level cross entropy without label smoothing;
  4. save model, tokenizer and the production decoding settings
     (generation_config.json) to sample_data/model/.
"""

import argparse
import json
import math
import random
import time
from pathlib import Path

import torch
from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors, trainers
from transformers import GenerationConfig, MarianConfig, MarianMTModel, PreTrainedTokenizerFast

HERE = Path(__file__).parent
SEED = 1234
VOCAB_SIZE = 400
SPECIALS = ["</s>", "<unk>", "<pad>"]  # ids 0, 1, 2
EOS_ID, UNK_ID, PAD_ID = 0, 1, 2

# production decoding settings shipped in generation_config.json
NUM_BEAMS = 2
LENGTH_PENALTY = 0.5


def read_tsv(path):
    with open(path, encoding="utf-8") as f:
        header = f.readline().rstrip("\n").split("\t")
        return [dict(zip(header, line.rstrip("\n").split("\t"))) for line in f]


def build_tokenizer(texts, out_dir: Path) -> PreTrainedTokenizerFast:
    tok = Tokenizer(models.BPE(unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.Sequence([
        pre_tokenizers.Metaspace(replacement="\u2581", prepend_scheme="always"),
        pre_tokenizers.Digits(individual_digits=True),
        pre_tokenizers.Punctuation(),
    ])
    tok.decoder = decoders.Metaspace(replacement="\u2581", prepend_scheme="always")
    trainer = trainers.BpeTrainer(vocab_size=VOCAB_SIZE, special_tokens=SPECIALS,
                                  initial_alphabet=list("0123456789"), show_progress=False)
    tok.train_from_iterator(texts, trainer)
    # every encoded sequence ends with </s> (source and target alike)
    tok.post_processor = processors.TemplateProcessing(
        single="$A </s>", pair="$A $B </s>", special_tokens=[("</s>", EOS_ID)])
    for t, i in zip(SPECIALS, (EOS_ID, UNK_ID, PAD_ID)):
        assert tok.token_to_id(t) == i, (t, tok.token_to_id(t))
    fast = PreTrainedTokenizerFast(tokenizer_object=tok, eos_token="</s>", unk_token="<unk>",
                                   pad_token="<pad>", model_max_length=512)
    fast.save_pretrained(out_dir)
    return fast


def make_batches(src_ids, tgt_ids, max_tokens, rng):
    """Length-bucketed batches with a token budget (source+target, padded)."""
    order = sorted(range(len(src_ids)), key=lambda i: (len(tgt_ids[i]), rng.random()))
    batches, cur, cur_max = [], [], 0
    for i in order:
        longest = max(cur_max, len(src_ids[i]) + len(tgt_ids[i]))
        if cur and longest * (len(cur) + 1) > max_tokens:
            batches.append(cur)
            cur, longest = [], len(src_ids[i]) + len(tgt_ids[i])
        cur.append(i)
        cur_max = longest
    if cur:
        batches.append(cur)
    return batches


def collate(idx, src_ids, tgt_ids):
    s_len = max(len(src_ids[i]) for i in idx)
    t_len = max(len(tgt_ids[i]) for i in idx)
    inp = torch.full((len(idx), s_len), PAD_ID, dtype=torch.long)
    att = torch.zeros((len(idx), s_len), dtype=torch.long)
    lab = torch.full((len(idx), t_len), -100, dtype=torch.long)
    for r, i in enumerate(idx):
        inp[r, : len(src_ids[i])] = torch.tensor(src_ids[i])
        att[r, : len(src_ids[i])] = 1
        lab[r, : len(tgt_ids[i])] = torch.tensor(tgt_ids[i])
    return inp, att, lab


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--data", default=str(HERE / "build"))
    ap.add_argument("--out", default=str(HERE / "model"))
    ap.add_argument("--steps", type=int, default=2400)
    ap.add_argument("--warmup", type=int, default=300)
    ap.add_argument("--lr", type=float, default=1e-3)
    ap.add_argument("--max-tokens", type=int, default=6000)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--log-every", type=int, default=50)
    ap.add_argument("--save-every", type=int, default=0)
    args = ap.parse_args()

    torch.set_num_threads(args.threads)
    random.seed(SEED)
    torch.manual_seed(SEED)
    rng = random.Random(SEED)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)

    train = read_tsv(Path(args.data) / "train.tsv")
    dev = read_tsv(Path(args.data) / "dev_refs.tsv")
    tok = build_tokenizer([r["source"] for r in train] + [r["target"] for r in train], out)
    src_ids = tok([r["source"] for r in train])["input_ids"]
    tgt_ids = tok(text_target=[r["target"] for r in train])["input_ids"]
    assert all(t[-1] == EOS_ID for t in tgt_ids[:100])
    dev_ref_len = max(len(x) for x in tok(text_target=[r["reference"] for r in dev])["input_ids"])
    dev_src_len = max(len(x) for x in tok([r["source"] for r in dev])["input_ids"])
    print(f"train rows {len(train)}; target tokens mean {sum(map(len, tgt_ids)) / len(tgt_ids):.1f}; "
          f"longest dev reference {dev_ref_len} tokens, longest dev source {dev_src_len}")

    config = MarianConfig(
        vocab_size=len(tok), decoder_vocab_size=len(tok), d_model=128,
        encoder_layers=3, decoder_layers=3,
        encoder_attention_heads=4, decoder_attention_heads=4,
        encoder_ffn_dim=256, decoder_ffn_dim=256,
        max_position_embeddings=256, dropout=0.0, attention_dropout=0.0,
        activation_dropout=0.0, activation_function="gelu", scale_embedding=True,
        pad_token_id=PAD_ID, eos_token_id=EOS_ID, decoder_start_token_id=PAD_ID,
        bos_token_id=None, forced_eos_token_id=None,
        share_encoder_decoder_embeddings=True, tie_word_embeddings=True,
    )
    model = MarianMTModel(config)
    n_params = sum(p.numel() for p in model.parameters())
    print(f"parameters: {n_params:,}")

    opt = torch.optim.AdamW(model.parameters(), lr=args.lr, betas=(0.9, 0.98),
                            weight_decay=0.01)

    def lr_at(step):
        if step < args.warmup:
            return (step + 1) / args.warmup
        return max(0.05, 1.0 - (step - args.warmup) / max(1, args.steps - args.warmup))

    sched = torch.optim.lr_scheduler.LambdaLR(opt, lr_at)
    gen = GenerationConfig(
        num_beams=NUM_BEAMS, length_penalty=LENGTH_PENALTY, do_sample=False,
        early_stopping=False, max_new_tokens=dev_ref_len + 40,
        decoder_start_token_id=PAD_ID, eos_token_id=EOS_ID, pad_token_id=PAD_ID,
        bos_token_id=None, forced_eos_token_id=None, bad_words_ids=None,
    )
    model.generation_config = gen

    def save(path):
        model.save_pretrained(path)
        tok.save_pretrained(path)

    model.train()
    step, t0, epoch = 0, time.time(), 0
    run_loss, run_tok = 0.0, 0
    log = []
    while step < args.steps:
        batches = make_batches(src_ids, tgt_ids, args.max_tokens, rng)
        rng.shuffle(batches)
        epoch += 1
        for idx in batches:
            if step >= args.steps:
                break
            inp, att, lab = collate(idx, src_ids, tgt_ids)
            outp = model(input_ids=inp, attention_mask=att, labels=lab)
            n_tok = int((lab != -100).sum())
            opt.zero_grad(set_to_none=True)
            outp.loss.backward()
            torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
            opt.step()
            sched.step()
            step += 1
            run_loss += outp.loss.item() * n_tok
            run_tok += n_tok
            if step % args.log_every == 0 or step == args.steps:
                el = time.time() - t0
                avg = run_loss / run_tok
                log.append({"step": step, "loss": round(avg, 4), "elapsed_s": round(el, 1)})
                print(f"step {step:5d} epoch {epoch} loss/token {avg:.4f} "
                      f"lr {sched.get_last_lr()[0]:.2e} {el / step:.2f}s/step {el / 60:.1f}min",
                      flush=True)
                run_loss, run_tok = 0.0, 0
            if args.save_every and step % args.save_every == 0 and step < args.steps:
                save(Path(args.data) / f"ckpt-{step}")  # intermediate, not shipped
    train_s = time.time() - t0

    model.eval()
    save(out)
    info = {"steps": args.steps, "train_seconds": round(train_s, 1), "final_loss": log[-1]["loss"],
            "parameters": n_params, "threads": args.threads, "max_tokens": args.max_tokens,
            "lr": args.lr, "warmup": args.warmup, "train_rows": len(train), "log": log}
    (Path(args.data) / "train_log.json").write_text(json.dumps(info, indent=1))
    print(f"done: {args.steps} steps in {train_s / 60:.1f} min, final loss/token {log[-1]['loss']}")


if __name__ == "__main__":
    main()
