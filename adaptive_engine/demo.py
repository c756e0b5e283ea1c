"""The guided demo: a simulation study of the licensing exam and a short survey session.

It uses the example files of the repository (``simulations/`` and ``item_banks/``), which
the installed package does not carry: they are looked for in the folder given as
``files`` (``adaptive-engine demo --files CHECKOUT``), else in the current folder, else
next to the package (a checkout installed with ``pip install -e .``).  When none holds
them the demo stops with an error naming the missing files and where it looked.
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
DEMO_FILES = (EXAM_DESIGN, EXAM_BANK, SURVEY_DESIGN, SURVEY_BANK)


def repository_root(files: str | Path | None = None) -> Path:
    """The folder holding the demo's example files (see the module notes).

    Raises
    ------
    AdaptiveEngineError
        Located at ``files`` when no candidate folder holds all of :data:`DEMO_FILES`.
    """
    if files is not None:
        candidates = [Path(files)]
    else:
        candidates = [Path.cwd(), Path(__file__).resolve().parents[1]]
    for root in candidates:
        if all((root / name).is_file() for name in DEMO_FILES):
            return root
    first = candidates[0]
    missing = [name for name in DEMO_FILES if not (first / name).is_file()]
    looked = " and ".join(str(c) for c in candidates)
    raise AdaptiveEngineError(
        f"the demo needs the example files {', '.join(missing)} of the adaptive_engine repository, "
        f"not found under {looked}; an installed package does not carry them: run the demo in a "
        "checkout of the repository or name one that holds them", "files")


def run_demo(*, out_dir: str | Path = "demo_output", examinees: int = 1000, seed: int = 2026,
             say: Callable[[str], None] = print, files: str | Path | None = None) -> dict:
    """Run the demo; ``say`` receives the lines to show.  Returns the two results.

    ``files``: a folder holding the example files (a repository checkout); default: the
    current folder or the package's checkout (:func:`repository_root`).
    """
    from .bank.item_bank import load_bank
    from .design.toml_file import read_design
    from .irt.models import probabilities
    from .live.session import try_session
    from .simulation.population import Population, parse_ability_spec
    from .simulation.study import run_study, summary_table

    root = repository_root(files)
    design = read_design(root / EXAM_DESIGN)
    bank = load_bank(root / EXAM_BANK)
    say(f"1. Simulating {examinees} examinees on the Meridian Valley water-operator licensing exam")
    say(f"   design {EXAM_DESIGN}, bank {EXAM_BANK} ({bank.n_items} items), seed {seed}")
    population = Population.drawn(parse_ability_spec("normal:0,1"), seed=seed, n_examinees=examinees)
    study = run_study(design, bank, population=population, out_dir=out_dir,
                      title="Demo: Meridian Valley water-operator licensing exam")
    say("")
    say(summary_table(study.summary))
    expo = study.summary["exposure"]
    if expo["share_above_target"]:
        # the design's randomesque control does not hold its busiest items at the target:
        # say so here, and let the report say where the exposure comes from
        above = round(expo["share_above_target"] * int(np.sum(bank.status == "operational")))
        say(f"   exposure: {above} items are given to more than {expo['exposure_target']:g} of the examinees "
            f"(the largest to {expo['max_exposure']:.2f}); the report's Exposure section says why")
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
        labels = survey_bank.category_labels_of(row)
        meaning = f" ({labels[answer]})" if labels else ""
        say(f"   {position:>2}. {item['item_id']:<6} {item['label'][:55]:<55} -> {answer}{meaning}")
        return str(answer)

    result = try_session(survey, survey_bank, ask=ask, tell=say, seed=seed)
    say(f"   stopped: {result['stop_reason']}; theta {result['theta']:.2f} (SE {result['se']:.2f}), "
        f"scaled score {result['scaled_score']}")
    return {"simulation": study.summary, "session": result}
