"""Tiny seeded decoder-only models the tests build themselves (random weights, no download).

- `make_chat_tokenizer`: a word-level tokenizer (the tokenizers library) with a chat template:
  <pad> 0, </s> 1 (end), <unk> 2, <s> 3 (start of text), <|user|> 4, <|system|> 5,
  <|assistant|> 6, <|stop|> 7 (a second end token), then the words of TEMPLATE_WORDS and WORDS.
- `make_causal(layout)`: a random GPT-2 layout ("gpt2") or Llama layout with grouped-query
  attention ("llama": 4 query heads over 2 key/value heads) over that tokenizer, in eval mode.
- `save_causal`: the same saved as a checkpoint folder (model, tokenizer, generation config).
"""

from __future__ import annotations

from pathlib import Path

import torch
from tinymodels import WORDS

PAD, END, UNK, BOS, USER, SYSTEM, ASSISTANT, STOP = range(8)
SPECIALS = ("<pad>", "</s>", "<unk>", "<s>", "<|user|>", "<|system|>", "<|assistant|>", "<|stop|>")
TEMPLATE_WORDS = ("Say", "it", "plainly:", "Answer:", "Please", "rewrite", "this", "notice:")
#: the chat template: each message as <|role|> content, then the assistant's turn
CHAT_TEMPLATE = ("{{ bos_token }}{% for m in messages %}<|{{ m['role'] }}|> {{ m['content'] }} {% endfor %}"
                 "{% if add_generation_prompt %}<|assistant|>{% endif %}")


def make_chat_tokenizer(*, add_bos: bool = False):
    """A word-level PreTrainedTokenizerFast with a chat template (see the module docstring).

    Texts split on whitespace; decoding joins words with spaces. With add_bos every encoded
    text starts with <s> (as Llama tokenizers do).
    """
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors
    from transformers import PreTrainedTokenizerFast

    vocab: dict[str, int] = {}
    for w in SPECIALS + TEMPLATE_WORDS + tuple(WORDS):
        vocab.setdefault(w, len(vocab))
    tok = Tokenizer(models.WordLevel(vocab=vocab, unk_token="<unk>"))
    tok.pre_tokenizer = pre_tokenizers.WhitespaceSplit()
    tok.decoder = decoders.WordPiece(prefix="##")
    if add_bos:
        tok.post_processor = processors.TemplateProcessing(single="<s> $A", special_tokens=[("<s>", BOS)])
    fast = PreTrainedTokenizerFast(tokenizer_object=tok, pad_token="<pad>", eos_token="</s>", unk_token="<unk>",
                                   bos_token="<s>",
                                   additional_special_tokens=["<|user|>", "<|system|>", "<|assistant|>",
                                                              "<|stop|>"])
    fast.chat_template = CHAT_TEMPLATE
    return fast


def make_causal(layout: str = "gpt2", seed: int = 0, *, d_model: int = 32, layers: int = 2,
                init_std: float = 0.3, end_bias: float = 1.0, end_scale: float = 3.0, two_ends: bool = False, **gen):
    """(model, tokenizer): a random decoder-only model whose completions end at varied lengths.

    The end token's logit gets end_bias added (through _bias_column) and its output row is
    scaled by end_scale, so that it wins in some contexts and not in others; <pad>, <unk>, <s> and the role tokens are never generated (their logits are pushed
    far down).
    With two_ends the generation config lists </s> and <|stop|> as end tokens. Extra keywords
    are set on the generation config.
    """
    from transformers import GPT2Config, GPT2LMHeadModel, LlamaConfig, LlamaForCausalLM

    tok = make_chat_tokenizer(add_bos=layout == "llama")
    vocab = len(tok)
    torch.manual_seed(seed)
    if layout == "gpt2":
        cfg = GPT2Config(vocab_size=vocab, n_positions=96, n_embd=d_model, n_layer=layers, n_head=2,
                         bos_token_id=BOS, eos_token_id=END, pad_token_id=PAD, initializer_range=init_std,
                         tie_word_embeddings=False)
        model = GPT2LMHeadModel(cfg)
    elif layout == "llama":
        cfg = LlamaConfig(vocab_size=vocab, hidden_size=d_model, intermediate_size=2 * d_model,
                          num_hidden_layers=layers, num_attention_heads=4, num_key_value_heads=2,
                          max_position_embeddings=96, bos_token_id=BOS, eos_token_id=END, pad_token_id=PAD,
                          initializer_range=init_std, tie_word_embeddings=False)
        model = LlamaForCausalLM(cfg)
    else:
        raise ValueError(f"unknown layout {layout!r}")
    model.eval()
    _bias_column(model, layout)
    with torch.no_grad():
        head = model.get_output_embeddings().weight
        bias = torch.zeros(vocab)
        bias[END] = end_bias
        bias[STOP] = end_bias if two_ends else -1e3
        for banned in (PAD, UNK, BOS, USER, SYSTEM, ASSISTANT):
            bias[banned] = -1e3
        head[:, 0] = bias
        head[END, 1:] *= end_scale  # the end token's logit varies with the context
        if two_ends:
            head[STOP, 1:] *= end_scale
    gc = model.generation_config
    gc.bos_token_id, gc.pad_token_id = BOS, PAD
    gc.eos_token_id = [END, STOP] if two_ends else END
    for k, v in gen.items():
        setattr(gc, k, v)
    return model, tok


def _bias_column(model, layout: str) -> None:
    """Make hidden feature 0 before the output head a positive constant-like value, so that
    column 0 of the head acts as a per-token bias (these layouts have no head bias).

    GPT-2: the final layer norm gives feature 0 weight 0 and bias 1 (exactly 1). Llama: every
    token embedding has feature 0 = 4 and no layer writes into feature 0, so the final RMS norm
    gives it a positive value (about 4 / rms, some 0.6 to 0.8).
    """
    with torch.no_grad():
        if layout == "gpt2":
            model.transformer.ln_f.weight[0] = 0.0
            model.transformer.ln_f.bias[0] = 1.0
            return
        model.model.embed_tokens.weight[:, 0] = 4.0
        for layer in model.model.layers:
            layer.self_attn.o_proj.weight[0, :] = 0.0
            layer.mlp.down_proj.weight[0, :] = 0.0


def save_causal(path: Path, layout: str = "gpt2", **kw) -> Path:
    """make_causal(layout, **kw) saved (model, tokenizer, generation config) as a checkpoint folder."""
    model, tok = make_causal(layout, **kw)
    path.mkdir(parents=True, exist_ok=True)
    model.save_pretrained(path)
    tok.save_pretrained(path)
    return path
