"""BART- and T5-architecture checkpoints: loaded from disk with the Auto classes, the recomputed
output score equals transformers' `generate` sequences_scores (external reference), including a
forced first token (BART's forced_bos_token_id: the processor sets it to log-prob 0) and a T5-style
source prefix."""

from __future__ import annotations

import pytest
import torch
from tinymodels import make_tokenizer, sentences

from triage.models.describe import model_settings
from triage.models.transformers_backend import load_transformers_model
from triage.run.pipeline import TriageOptions, run_triage


def _bart(path):
    from transformers import BartConfig, BartForConditionalGeneration

    tok = make_tokenizer()
    torch.manual_seed(5)
    cfg = BartConfig(vocab_size=len(tok), d_model=32, encoder_layers=1, decoder_layers=1,
                     encoder_attention_heads=2, decoder_attention_heads=2, encoder_ffn_dim=64,
                     decoder_ffn_dim=64, max_position_embeddings=64, pad_token_id=0, eos_token_id=1,
                     bos_token_id=3, decoder_start_token_id=1, forced_bos_token_id=3, init_std=0.3)
    m = BartForConditionalGeneration(cfg).eval()
    with torch.no_grad():
        m.final_logits_bias[0, 1] = 3.0
        m.final_logits_bias[0, 0] = m.final_logits_bias[0, 2] = -1e4
    m.generation_config.forced_bos_token_id = 3
    m.generation_config.forced_eos_token_id = None
    m.generation_config.num_beams, m.generation_config.length_penalty = 3, 1.0
    m.generation_config.max_new_tokens = 12
    m.save_pretrained(path)
    tok.save_pretrained(path)
    return path


def _t5(path):
    from transformers import T5Config, T5ForConditionalGeneration

    tok = make_tokenizer()
    torch.manual_seed(6)
    cfg = T5Config(vocab_size=len(tok), d_model=32, d_kv=16, d_ff=64, num_layers=1, num_decoder_layers=1,
                   num_heads=2, pad_token_id=0, eos_token_id=1, decoder_start_token_id=0,
                   initializer_factor=3.0)
    m = T5ForConditionalGeneration(cfg).eval()
    with torch.no_grad():
        m.lm_head.weight[0].fill_(0.0)
        m.lm_head.weight[2].fill_(0.0)
    m.generation_config.num_beams, m.generation_config.length_penalty = 3, 0.7
    m.generation_config.max_new_tokens = 12
    m.save_pretrained(path)
    tok.save_pretrained(path)
    return path


@pytest.mark.parametrize("build, prefix", [(_bart, ""), (_t5, "north: ")])
def test_generate_scores_reproduced(tmp_path, build, prefix):
    model = load_transformers_model(str(build(tmp_path / "ckpt")))
    settings = model_settings(model, source_prefix=prefix)
    srcs = sentences(6, seed=8)
    gc = settings.to_generation_config(model.model.generation_config)
    gc.return_dict_in_generate, gc.output_scores = True, True
    outputs, expected = [], []
    for s in srcs:
        ids = torch.tensor(model.tokenize_sources([prefix + s]))
        with torch.no_grad():
            out = model.model.generate(input_ids=ids, generation_config=gc)
        seq = out.sequences[0, 1:].tolist()
        toks = seq[: seq.index(model.end_id)] if model.end_id in seq else seq
        outputs.append(model.detokenize(toks))
        expected.append(float(out.sequences_scores[0]))
    import pandas as pd

    frame = pd.DataFrame({"id": [str(i) for i in range(6)], "source": srcs,
                          "references": [["platform platform bus"]] * 6, "output": outputs, "line": range(2, 8)})
    res = run_triage(model, frame, settings, TriageOptions(progress=False))
    got = res.verdicts["out_score"].tolist()
    assert got == pytest.approx(expected, abs=1e-4)
    if build is _bart:
        # the forced first token contributes log-prob 0, as transformers' ForcedBOSTokenLogitsProcessor sets it
        first = [t["output"]["logprobs"][0] for t in res.tokens]
        assert first == [0.0] * len(first)
