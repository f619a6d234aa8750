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


@pytest.fixture(autouse=True, scope="session")
def _written_summaries_follow_the_schema():
    """Every summary.json a run folder gets in this process (CLI runs through main(), library
    runs) is validated against the shipped schema the moment it is written."""
    from schema_check import validate_summary_file

    from triage.rundir import writer

    real = writer.RunWriter.finish

    def finish(self, summary, run_info=None):
        out = real(self, summary, run_info)
        validate_summary_file(self.out / "summary.json")
        return out

    patch = pytest.MonkeyPatch()
    patch.setattr(writer.RunWriter, "finish", finish)
    yield
    patch.undo()
