"""The guided demo: a simulation study of the licensing exam and a short survey session.

It uses the files shipped in the repository (``simulations/`` and ``item_banks/``), found
from the package's location (the package is installed in editable mode from the
repository).
"""

from __future__ import annotations

from pathlib import Path
from typing import Callable

import numpy as np

from .errors import AdaptiveEngineError

EXAM_DESIGN = "simulations/licensing_exam.toml"
EXAM_BANK = "item_banks/meridian_valley_operator.csv"
SURVEY_DESIGN = "simulations/staff_climate_survey.toml"
SURVEY_BANK = "item_banks/staff_climate_survey.csv"


def repository_root() -> Path:
    """The repository folder holding the shipped demo files (raises when they are missing)."""
    root = Path(__file__).resolve().parents[1]
    missing = [p for p in (EXAM_DESIGN, EXAM_BANK, SURVEY_DESIGN, SURVEY_BANK) if not (root / p).is_file()]
    if missing:
        raise AdaptiveEngineError(
            f"the demo files are not next to the package ({', '.join(missing)} missing under {root}); "
            "the demo runs from a checkout of the repository installed with pip install -e .",
            "demo")
    return root


def run_demo(*, out_dir: str | Path = "demo_output", examinees: int = 1000, seed: int = 2026,
             say: Callable[[str], None] = print) -> dict:
    """Run the demo; ``say`` receives the lines to show.  Returns the two results."""
    from .bank import load_bank
    from .design_file import read_design
    from .examinees import parse_ability_spec
    from .models import probabilities
    from .session import try_session
    from .simulation_files import run_study, summary_table

    root = repository_root()
    design = read_design(root / EXAM_DESIGN)
    bank = load_bank(root / EXAM_BANK)
    say(f"1. Simulating {examinees} examinees on the Meridian Valley water-operator licensing exam")
    say(f"   design {EXAM_DESIGN}, bank {EXAM_BANK} ({bank.n_items} items), seed {seed}")
    study = run_study(design, bank, abilities=parse_ability_spec("normal:0,1"), n_examinees=examinees,
                      seed=seed, out_dir=out_dir,
                      title="Demo: Meridian Valley water-operator licensing exam")
    say("")
    say(summary_table(study.summary))
    say("")
    say(f"   report: {Path(out_dir).resolve() / 'report.html'} (and the CSV/JSON files beside it)")
    say("")
    survey = read_design(root / SURVEY_DESIGN)
    survey_bank = load_bank(root / SURVEY_BANK)
    true_theta = 0.8
    rng = np.random.default_rng(seed)
    say(f"2. A scripted staff-climate survey session (answers 0-4 drawn for a respondent at theta {true_theta})")

    def ask(item: dict, position: int) -> str:
        row = survey_bank.index_of[item["item_id"]]
        p = probabilities(survey_bank.params.take(np.array([row])), np.array([true_theta]))[0]
        answer = int(rng.choice(p.size, p=p / p.sum()))
        say(f"   {position:>2}. {item['item_id']:<6} {item['label'][:55]:<55} -> {answer}")
        return str(answer)

    result = try_session(survey, survey_bank, ask=ask, tell=say, seed=seed)
    say(f"   stopped: {result['stop_reason']}; theta {result['theta']:.2f} (SE {result['se']:.2f}), "
        f"scaled score {result['scaled_score']}")
    return {"simulation": study.summary, "session": result}
