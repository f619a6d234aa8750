import sys
from pathlib import Path

import pytest
import torch

sys.path.insert(0, str(Path(__file__).parent))

# tiny models run far faster on one thread, and the suite shares 2 cores with whatever else runs
torch.set_num_threads(1)


@pytest.fixture(scope="session")
def tiny_model_dir(tmp_path_factory):
    from tinymodels import save_marian

    return save_marian(tmp_path_factory.mktemp("tiny") / "model", seed=0, num_beams=4, length_penalty=1.0,
                       max_new_tokens=16)
