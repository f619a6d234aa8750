"""triage.decoding.watch: decoding while watching a given output, against transformers' own generate.

Outside source: transformers 5.24 `generate` on a Marian-architecture model, one source at a
time (no padding), at exactly the settings decoded. A row that stopped early must be one whose
generate output differs from the watched target; a row decoded to its end must give generate's
output.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
import torch

sys.path.insert(0, str(Path(__file__).parent))
from tinymodels import END, make_wrapped_marian, random_sources  # noqa: E402

from triage.decoding.watch import decode_watching, own_search_matches  # noqa: E402
from triage.settings import DecoderSettings  # noqa: E402

torch.set_num_threads(1)
LIMIT = 7


def _generate(model, settings: DecoderSettings, sources) -> list[list[int]]:
    """generate's output ids per source (start token dropped, cut before the end token)."""
    gc = settings.to_generation_config(model.model.generation_config)
    out = []
    with torch.no_grad():
        for src in sources:
            seq = model.model.generate(input_ids=torch.tensor([src]), generation_config=gc)[0, 1:].tolist()
            out.append(seq[: seq.index(END)] if END in seq else seq)
    return out


@pytest.fixture(scope="module")
def setup():
    model = make_wrapped_marian(0)
    sources = random_sources(12, seed=10)
    base = DecoderSettings.from_generation_config(model.model.generation_config, max_new_tokens=LIMIT)
    # the watched targets: what the decoder writes at other settings (some reproduce, some not)
    claimed = [base.replace(beam=b, alpha=a) for b, a in ((1, 1.0), (3, 0.0), (5, 1.0), (2, 0.7))]
    pools = [_generate(model, c, sources) for c in claimed]
    return model, sources, base, pools


@pytest.mark.parametrize("beam, alpha, early", [(1, 1.0, False), (2, 1.0, False), (3, 0.0, True), (4, 0.7, "never"),
                                                (5, 1.0, False)])
def test_stopped_rows_differ_and_decoded_rows_are_generates(setup, beam, alpha, early):
    model, sources, base, pools = setup
    s = base.replace(beam=beam, alpha=alpha, early_stopping=early)
    want = _generate(model, s, sources)
    stopped = decoded_same = 0
    for targets in pools:
        got = decode_watching(model, s, sources, targets, batch_size=5)
        for w, target, ref in zip(got, targets, want, strict=True):
            if w.decoded is None:
                stopped += 1
                assert ref != target  # generate at these settings does not give the watched output
                assert w.left_at is not None and 1 <= w.left_at <= LIMIT + 1 and w.reason
            else:
                assert w.decoded.ids == ref  # decoded to its end: generate's own output
                decoded_same += w.decoded.ids == target
    assert decoded_same > 0  # the pools hold outputs these settings reproduce
    if beam in (1, 2):
        assert stopped > 0  # and outputs that leave the search early


def test_targets_at_the_length_limit_and_unwatched_rows_decode_to_their_end(setup):
    model, sources, base, pools = setup
    s = base.replace(beam=3, alpha=1.0)
    want = _generate(model, s, sources)
    targets = [list(range(3, 3 + LIMIT)) if i % 3 == 0 else (None if i % 3 == 1 else t)
               for i, t in enumerate(pools[0])]  # LIMIT tokens: could only come out cut by the limit
    for w, target, ref in zip(decode_watching(model, s, sources, targets), targets, want, strict=True):
        if target is None or len(target) >= LIMIT:
            assert w.decoded is not None and w.decoded.ids == ref and w.left_at is None


def test_greedy_under_a_repetition_penalty_is_decoded_by_the_models_own_decoder(setup):
    model, sources, base, pools = setup
    s = base.replace(beam=1, repetition_penalty=1.5)
    assert not own_search_matches(model, s)
    want = _generate(model, s, sources)
    for w, ref in zip(decode_watching(model, s, sources, pools[1]), want, strict=True):
        assert w.decoded is not None and w.decoded.ids == ref
