"""Generate the demo item banks of two invented scenarios (bit-for-bit reproducible).

Run ``python item_banks/make_demo_banks.py [OUT_DIR]`` (default: this folder).  It writes

* ``meridian_valley_operator.csv`` / ``.json`` -- 500 dichotomous items of the fictional
  Meridian Valley water-operator licensing exam;
* ``staff_climate_survey.csv`` / ``.json`` -- 40 rated items (answers 0-4) of the
  staff-climate survey the (equally fictional) Meridian Valley water utility gives its
  plant operators, field crews, control-room and lab staff;
* ``meridian_valley_operator_2d.csv`` / ``.json`` -- 360 items of a two-dimensional variant
  of the operator exam (M2PL, M3PL and MGRM items; dimensions ``treatment_operations`` and
  ``regulation_and_safety``).

and two long response files (``person_id,item_id,response``) of invented people answering
them, for the README tour (``adaptive-engine score``, calibration):

* ``meridian_valley_responses.csv`` -- 300 invented candidates, 30 operational items each;
* ``staff_climate_responses.csv`` -- 600 invented respondents answering all 40 survey items
  (complete data, enough to calibrate the survey bank again).

Banks and answers are invented for demonstration only: they are not calibrated from any
data and must never serve as a reference in tests.  Every draw comes from one
``numpy.random.Generator`` per bank with a fixed seed, and every parameter is rounded to 3
decimals (the precision calibration reports usually give), so the same numpy release
regenerates identical files.

Parameter distributions (plausible for operational banks, chosen by us):

Meridian Valley operator exam (scaling D = 1.0, logistic metric)
    * five content areas of 100 items each: source_water, treatment_processes,
      distribution_systems, lab_and_monitoring, safety_and_regulations;
    * models: 3PL for 80 % of the items (four-option multiple choice), 2PL for 10 %
      (numeric-entry items, no guessing), 4PL for 10 % (items where able examinees slip);
    * discrimination: log a ~ N(0.1, 0.3^2), so a has median about 1.1;
    * difficulty: b ~ N(mu_area, 1) with area means -0.3 (safety), -0.1 (source water),
      0 (distribution), 0.1 (treatment), 0.2 (lab): b ~ N(0, 1) overall;
    * lower asymptote (3PL, 4PL): c ~ Beta(5, 17), mean 0.23, near 1/4 for four options;
    * upper asymptote (4PL): d ~ Beta(38, 2), mean 0.95;
    * 15 enemy groups (10 pairs, 5 triples) of near-duplicate items inside one area, drawn
      with difficulties close to the group's first item (b + N(0, 0.15^2));
    * 10 item sets of 3-5 items sharing a scenario (a plant schematic, a lab report, a
      distribution map), in the treatment, distribution and lab areas;
    * 20 pretest items (status ``pretest``) drawn from items in no set and no enemy group.

Response files: each person's ability is drawn from N(0, 1), their items are drawn at
random without replacement from the operational items (in the order listed, as if
administered), and each answer is drawn from the bank's own model at that ability (one
uniform number per answer, compared with the cumulative category probabilities).

Two-dimensional operator exam (scaling D = 1.0, logistic metric, slope-intercept form)
    * dimensions ``treatment_operations`` (running the plant and the network) and
      ``regulation_and_safety`` (rules, monitoring duties, safe work), meant for a population
      in which the two correlate about 0.6;
    * five areas: source_water 60, treatment_processes 90 and distribution_systems 60 items
      measure treatment_operations first; safety_and_regulations 90 and lab_and_monitoring 60
      measure regulation_and_safety first;
    * mostly simple structure: an item measures its area's dimension only, except 10 % of the
      items (15 % in source water and distribution, 40 % in the lab area, where monitoring
      duties draw on plant knowledge) which also measure the other one;
    * models: M3PL 78 % (four-option multiple choice), M2PL 12 % (numeric entry), MGRM 10 %
      (work orders scored 0-2);
    * slope on the item's own dimension: log a ~ N(0.1, 0.3^2); on the other dimension (items
      measuring both): log a ~ N(-0.4, 0.3^2); 0 otherwise;
    * MDIFF ~ N(mu_area, 1) with the area means of the one-dimensional exam, turned into the
      intercept ``-MDISC * MDIFF`` (Reckase 1985); MGRM boundaries at MDIFF + sorted((-0.8,
      0.8) + N(0, 0.15^2)); c ~ Beta(5, 17) for M3PL items;
    * 10 enemy groups (6 pairs, 4 triples) of near-duplicates in one area (the same slopes,
      MDIFF within N(0, 0.15^2) of the group's first item), 6 item sets of 3-5 items sharing a
      scenario, and 15 pretest items outside sets and enemy groups.

Staff-climate survey (scaling D = 1.0; categories 0 = strongly disagree .. 4 = strongly agree)
    * four areas of 10 items: workload, team_support, leadership, wellbeing; every statement
      is written for this utility (shifts, plant, crews, control room, briefings) and
      worded so that agreeing means a better climate;
    * GRM for the even-numbered items, GPCM for the odd-numbered ones;
    * GRM: log a ~ N(log 1.6, 0.25^2); thresholds = location + sorted(base + N(0, 0.15^2))
      with location ~ N(-0.3, 0.5^2) and base = (-2.0, -0.8, 0.3, 1.5);
    * GPCM: log a ~ N(log 1.0, 0.25^2); steps = location + base + N(0, 0.3^2), unsorted
      (step reversals are legal in the GPCM).
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
if str(HERE.parent) not in sys.path:  # run as a script from a checkout
    sys.path.insert(0, str(HERE.parent))

from adaptive_engine.bank import ItemBank, bank_from_records  # noqa: E402
from adaptive_engine.bank.files import write_bank  # noqa: E402
from adaptive_engine.errors import AdaptiveEngineError  # noqa: E402
from adaptive_engine.files import write_text  # noqa: E402
from adaptive_engine.irt.models import probabilities as category_probabilities  # noqa: E402

OPERATOR_SEED = 20_240_611
SURVEY_SEED = 20_240_612
OPERATOR_RESPONSES_SEED = 20_240_613
OPERATOR_2D_SEED = 20_240_615
SURVEY_RESPONSES_SEED = 20_240_614
#: (file name, persons, items per person, person id prefix) of each response file
OPERATOR_RESPONSES = ("meridian_valley_responses.csv", 300, 30, "MV-CAND")
SURVEY_RESPONSES = ("staff_climate_responses.csv", 600, 40, "SC-RESP")
DECIMALS = 3
#: What the survey's five response categories 0..4 mean (stored with every survey item).
SURVEY_CATEGORY_LABELS = ["strongly disagree", "disagree", "neither agree nor disagree", "agree", "strongly agree"]
#: The second (invented) licensing form for ``link``: file, seed, anchors shared with the
#: operational bank, new items, and the scale it was calibrated on relative to the bank's
#: (theta_form = (theta_bank - SHIFT) / SLOPE).
NEW_FORM = ("meridian_valley_new_form.csv", 20_240_616, 24, 16)
NEW_FORM_SCALE = (1.15, 0.3)

OPERATOR_AREAS = {
    # area: (id code, mean difficulty, topics)
    "source_water": ("SRC", -0.1, [
        "Aquifer recharge", "Well drawdown", "Reservoir turnover", "Intake screen fouling",
        "Raw water turbidity", "Algal bloom response", "Watershed protection zone",
        "Spring box maintenance", "Surface water intake siting", "Groundwater under influence",
        "Well casing inspection", "Source water nitrate", "Iron and manganese in wells",
        "Drought storage planning", "Stream flow measurement", "Wellhead sanitary seal",
        "Raw water pump selection", "Seasonal temperature change", "Sediment in intakes",
        "Source water sampling plan",
    ]),
    "treatment_processes": ("TRT", 0.1, [
        "Chlorine contact time", "Coagulant dose", "Jar testing", "Flocculation mixing energy",
        "Sedimentation basin loading", "Filter backwash", "Filter head loss",
        "Breakpoint chlorination", "Chloramine ratio", "Ozone residual",
        "UV dose", "pH adjustment with lime", "Corrosion control inhibitor",
        "Fluoride feed", "Softening by lime", "Activated carbon for taste and odor",
        "Membrane fouling", "Sludge handling", "Clearwell baffling", "Chemical feed pump calibration",
    ]),
    "distribution_systems": ("DST", 0.0, [
        "Main flushing", "Cross-connection control", "Backflow preventer testing",
        "Storage tank turnover", "Pressure zone boundaries", "Water hammer",
        "Hydrant maintenance", "Valve exercising", "Main break repair",
        "New main disinfection", "Service line materials", "Meter accuracy",
        "Pipe roughness and head loss", "Booster pump station", "Chlorine residual decay",
        "Dead-end mains", "Leak detection", "Tank coating inspection",
        "Pressure transient monitoring", "Fire flow demand",
    ]),
    "lab_and_monitoring": ("LAB", 0.2, [
        "Coliform sampling", "Chlorine residual test", "Turbidity meter calibration",
        "pH meter calibration", "Sample holding times", "Chain of custody",
        "Alkalinity titration", "Hardness titration", "Jar test records",
        "Disinfection byproduct sampling", "Lead and copper sampling", "Quality control blanks",
        "Online analyzer drift", "Heterotrophic plate count", "Sample bottle preservation",
        "Monitoring schedule", "Reporting significant figures", "Conductivity measurement",
        "Temperature compensation", "Laboratory safety glassware",
    ]),
    "safety_and_regulations": ("SAF", -0.3, [
        "Chlorine gas leak response", "Confined space entry", "Lockout and tagout",
        "Trench shoring", "Personal protective equipment", "Public notification",
        "Boil water notice", "Operator certification renewal", "Safety data sheets",
        "Chemical storage compatibility", "Emergency response plan", "Fall protection",
        "Hearing protection", "Traffic control at work zones", "Electrical safety near pumps",
        "Record retention", "Consumer confidence report", "Maximum contaminant levels",
        "Treatment technique violations", "Ventilation of chemical rooms",
    ]),
}
OPERATOR_ASPECTS = ("principle", "calculation", "troubleshooting", "operating limits",
                    "field procedure")
OPERATOR_SCENARIOS = {
    "treatment_processes": ["Plant schematic: rapid mix to clearwell",
                            "Plant schematic: filter gallery",
                            "Plant schematic: chemical feed room",
                            "Daily operating log: winter week"],
    "distribution_systems": ["Distribution map: north pressure zone",
                             "Distribution map: tank and booster station",
                             "Main break work order"],
    "lab_and_monitoring": ["Lab report: monthly bacteriological results",
                           "Lab report: turbidity trend",
                           "Sampling plan: new subdivision"],
}
ITEMS_PER_AREA = 100
N_PRETEST = 20

SURVEY_AREAS = {
    # Statements written for the utility's own survey: every one names something of its
    # daily work (shifts, the plant, field crews, the control room, briefings), and all are
    # worded so that agreeing means a better climate.
    "workload": [
        "The work on my shift fits in my rostered hours",
        "On-call weekends are shared fairly in my crew",
        "I rarely carry work orders over to the next shift",
        "Work-order due dates allow for travel between sites",
        "I have time to double-check readings before logging",
        "Unplanned call-outs rarely upset my day's plan",
        "I can take my meal break even on a busy shift",
        "Overtime after main breaks is kept within limits",
        "Our vans are stocked with the parts a repair needs",
        "Most of my week goes to planned, not emergency, work",
    ],
    "team_support": [
        "If my job list overruns, a crew mate takes a job",
        "I can radio a colleague for advice in the field",
        "New starters get a proper walk-round of the plant",
        "The control room keeps field crews informed",
        "Disputes over rota swaps are settled fairly",
        "I trust my crew to follow the lockout procedure",
        "A job well done gets mentioned at the morning briefing",
        "Night-shift staff are treated as part of the team",
        "The shift hand-over log tells me what I need",
        "Our toolbox talks are worth the time they take",
    ],
    "leadership": [
        "My supervisor explains why work plans change",
        "After a big job my supervisor reviews it with us",
        "Supervisors apply site rules equally to all crews",
        "I know which plant checks are mine on each shift",
        "Faults we report at depot meetings get fixed",
        "I can stop a job I think is unsafe without blame",
        "I get support to train for a higher operator grade",
        "Roster changes are announced well ahead",
        "Senior managers visit the plant and the depots",
        "When my supervisor says a fix is coming, it comes",
    ],
    "wellbeing": [
        "I recover well between my night shifts",
        "On-call duty leaves room for my family life",
        "Storm nights and main breaks rarely leave me drained",
        "I feel looked after when working alone at remote sites",
        "Chlorine and chemical handling here feels safe",
        "Keeping the valley's water safe feels worthwhile",
        "I can take my holidays when my family needs them",
        "After a hard incident, someone checks how we are",
        "Heat, noise and fumes at my post are kept bearable",
        "I plan to build my career at Meridian Valley Water",
    ],
}
#: The two-dimensional exam: its dimensions, and per area (id code, items, own dimension,
#: share of items measuring both dimensions).
OPERATOR_2D_DIMENSIONS = ("treatment_operations", "regulation_and_safety")
OPERATOR_2D_AREAS = {
    "source_water": ("SRC", 60, 0, 0.15),
    "treatment_processes": ("TRT", 90, 0, 0.10),
    "distribution_systems": ("DST", 60, 0, 0.15),
    "lab_and_monitoring": ("LAB", 60, 1, 0.40),
    "safety_and_regulations": ("SAF", 90, 1, 0.10),
}
OPERATOR_2D_MODELS = (("M3PL", 0.78), ("M2PL", 0.12), ("MGRM", 0.10))
OPERATOR_2D_SETS = 6
OPERATOR_2D_ENEMY_GROUPS = (6, 4)  # pairs, triples
OPERATOR_2D_PRETEST = 15
MGRM_BASE = np.array([-0.8, 0.8])
GRM_BASE = np.array([-2.0, -0.8, 0.3, 1.5])
GPCM_BASE = np.array([-1.5, -0.5, 0.5, 1.5])


def _round(x):
    return float(np.round(float(x), DECIMALS))


def _operator_item(rng: np.random.Generator, model: str, mean_b: float) -> dict:
    rec = {"model": model, "a": _round(np.exp(rng.normal(0.1, 0.3))),
           "b": _round(rng.normal(mean_b, 1.0)), "c": 0.0, "d": 1.0}
    if model in ("3PL", "4PL"):
        rec["c"] = _round(rng.beta(5, 17))
    if model == "4PL":
        rec["d"] = _round(rng.beta(38, 2))
    return rec


def make_operator_bank(seed: int = OPERATOR_SEED) -> ItemBank:
    """The Meridian Valley water-operator exam bank (500 dichotomous items)."""
    rng = np.random.default_rng(seed)
    records = []
    for area, (code, mean_b, topics) in OPERATOR_AREAS.items():
        labels = [f"{t}: {aspect}" for t in topics for aspect in OPERATOR_ASPECTS]
        order = rng.permutation(len(labels))
        models = rng.choice(["3PL", "2PL", "4PL"], size=ITEMS_PER_AREA, p=[0.8, 0.1, 0.1])
        for j in range(ITEMS_PER_AREA):
            rec = _operator_item(rng, str(models[j]), mean_b)
            rec.update(item_id=f"MV-{code}-{j + 1:03d}", area=area, item_set="",
                       enemy_group=[], status="operational", label=labels[order[j]])
            records.append(rec)
    by_area = {area: [i for i, r in enumerate(records) if r["area"] == area]
               for area in OPERATOR_AREAS}
    taken: set[int] = set()

    def free_items(area, k):
        pool = [i for i in by_area[area] if i not in taken]
        chosen = [int(i) for i in rng.choice(pool, size=k, replace=False)]
        taken.update(chosen)
        return chosen

    # item sets: items that share a scenario, in the areas that have scenarios
    set_number = 0
    for area, scenarios in OPERATOR_SCENARIOS.items():
        for scenario in scenarios:
            set_number += 1
            set_id = f"set_{OPERATOR_AREAS[area][0].lower()}_{set_number:02d}"
            for i in free_items(area, int(rng.integers(3, 6))):
                records[i]["item_set"] = set_id
                records[i]["label"] = f"{scenario} - {records[i]['label']}"
    # enemy groups: near-duplicates of a group's first item (same topic, close difficulty)
    areas = list(OPERATOR_AREAS)
    for g in range(15):
        area = areas[g % len(areas)]
        members = free_items(area, 2 if g < 10 else 3)
        first = records[members[0]]
        for n, i in enumerate(members):
            records[i]["enemy_group"] = [f"enemy_{g + 1:02d}"]
            if n:
                records[i]["b"] = _round(first["b"] + rng.normal(0.0, 0.15))
                records[i]["label"] = f"{first['label']} (variant {n})"
    for i in free_items_any(rng, records, taken, N_PRETEST):
        records[i]["status"] = "pretest"
    return bank_from_records(records, scaling=1.0, name="meridian_valley_operator")


def free_items_any(rng: np.random.Generator, records: list, taken: set, k: int) -> list[int]:
    """``k`` items from the whole bank that are in no set and no enemy group, in bank order."""
    pool = [i for i in range(len(records)) if i not in taken]
    return sorted(int(i) for i in rng.choice(pool, size=k, replace=False))


def _operator_2d_item(rng: np.random.Generator, model: str, own: int, both: bool, mean_b: float) -> dict:
    slopes = [0.0, 0.0]
    slopes[own] = _round(np.exp(rng.normal(0.1, 0.3)))
    if both:
        slopes[1 - own] = _round(np.exp(rng.normal(-0.4, 0.3)))
    mdisc = float(np.hypot(*slopes))
    mdiff = rng.normal(mean_b, 1.0)
    rec = {"model": model, "slopes": slopes}
    if model == "MGRM":
        boundaries = mdiff + np.sort(MGRM_BASE + rng.normal(0.0, 0.15, size=MGRM_BASE.size))
        rec["intercepts"] = [_round(-mdisc * x) for x in boundaries]
    else:
        rec["intercept"] = _round(-mdisc * mdiff)
    if model == "M3PL":
        rec["c"] = _round(rng.beta(5, 17))
    return rec


def _shift_difficulty(rec: dict, shift: float) -> None:
    """Move an item's MDIFF by ``shift`` (every boundary), keeping its slopes."""
    mdisc = float(np.hypot(*rec["slopes"]))
    if "intercepts" in rec:
        rec["intercepts"] = [_round(x - mdisc * shift) for x in rec["intercepts"]]
    else:
        rec["intercept"] = _round(rec["intercept"] - mdisc * shift)


def make_operator_2d_bank(seed: int = OPERATOR_2D_SEED) -> ItemBank:
    """The two-dimensional Meridian Valley operator exam (360 M2PL, M3PL and MGRM items)."""
    rng = np.random.default_rng(seed)
    names, shares = zip(*OPERATOR_2D_MODELS)
    records = []
    for area, (code, n_items, own, share_both) in OPERATOR_2D_AREAS.items():
        _, mean_b, topics = OPERATOR_AREAS[area]
        labels = [f"{t}: {aspect}" for t in topics for aspect in OPERATOR_ASPECTS]
        order = rng.permutation(len(labels))
        models = rng.choice(names, size=n_items, p=shares)
        both = rng.random(n_items) < share_both
        for j in range(n_items):
            rec = _operator_2d_item(rng, str(models[j]), own, bool(both[j]), mean_b)
            rec.update(item_id=f"MV2-{code}-{j + 1:03d}", area=area, item_set="", enemy_group=[],
                       status="operational", label=labels[order[j]])
            records.append(rec)
    by_area = {area: [i for i, r in enumerate(records) if r["area"] == area] for area in OPERATOR_2D_AREAS}
    taken: set[int] = set()

    def free_items(area, k):
        pool = [i for i in by_area[area] if i not in taken]
        chosen = [int(i) for i in rng.choice(pool, size=k, replace=False)]
        taken.update(chosen)
        return chosen

    scenarios = [(area, scenario) for area, names_ in OPERATOR_SCENARIOS.items() for scenario in names_[:2]]
    for number, (area, scenario) in enumerate(scenarios[:OPERATOR_2D_SETS], start=1):
        set_id = f"set_{OPERATOR_AREAS[area][0].lower()}_{number:02d}"
        for i in free_items(area, int(rng.integers(3, 6))):
            records[i]["item_set"] = set_id
            records[i]["label"] = f"{scenario} - {records[i]['label']}"
    areas = list(OPERATOR_2D_AREAS)
    pairs, triples = OPERATOR_2D_ENEMY_GROUPS
    for g in range(pairs + triples):
        members = free_items(areas[g % len(areas)], 2 if g < pairs else 3)
        first = records[members[0]]
        for n, i in enumerate(members):
            records[i]["enemy_group"] = [f"enemy_{g + 1:02d}"]
            if n:
                variant = {k: v for k, v in first.items() if k not in ("item_id", "status")}
                variant.update(item_id=records[i]["item_id"], status=records[i]["status"],
                               label=f"{first['label']} (variant {n})", enemy_group=[f"enemy_{g + 1:02d}"])
                _shift_difficulty(variant, rng.normal(0.0, 0.15))
                records[i] = variant
    for i in free_items_any(rng, records, taken, OPERATOR_2D_PRETEST):
        records[i]["status"] = "pretest"
    return bank_from_records(records, scaling=1.0, name="meridian_valley_operator_2d",
                             dimensions=list(OPERATOR_2D_DIMENSIONS))


def make_survey_bank(seed: int = SURVEY_SEED) -> ItemBank:
    """The staff-climate survey bank (40 items, GRM and GPCM, categories 0-4)."""
    rng = np.random.default_rng(seed)
    records = []
    number = 0
    for area, statements in SURVEY_AREAS.items():
        for statement in statements:
            number += 1
            location = rng.normal(-0.3, 0.5)
            if number % 2 == 0:
                model = "GRM"
                a = np.exp(rng.normal(np.log(1.6), 0.25))
                thresholds = location + np.sort(GRM_BASE + rng.normal(0.0, 0.15, size=4))
            else:
                model = "GPCM"
                a = np.exp(rng.normal(np.log(1.0), 0.25))
                thresholds = location + GPCM_BASE + rng.normal(0.0, 0.3, size=4)
            records.append({
                "item_id": f"SC-{number:02d}", "model": model, "a": _round(a),
                "thresholds": [_round(t) for t in thresholds], "area": area,
                "status": "operational", "label": statement, "category_labels": SURVEY_CATEGORY_LABELS,
            })
    return bank_from_records(records, scaling=1.0, name="staff_climate_survey")


def make_new_form(operator: ItemBank) -> ItemBank:
    """A small second licensing form that shares anchor items with ``operator``.

    The form's parameters are on its own scale, as if it had been calibrated on its own
    group of candidates: theta_form = (theta_bank - shift) / slope, so a_form = slope * a
    and b_form = (b - shift) / slope, with a little estimation noise.  One anchor drifted
    (its difficulty moved by 0.8 on the bank's scale); the other items are new.  ``link``
    recovers the slope and shift from the anchors.
    """
    _, seed, n_anchors, n_new = NEW_FORM
    slope, shift = NEW_FORM_SCALE
    rng = np.random.default_rng(seed)
    dichotomous = np.flatnonzero((operator.status == "operational") & np.isin(operator.model, ["2PL", "3PL"]))
    anchors = np.sort(rng.choice(dichotomous, size=n_anchors, replace=False))
    records = []
    for j, i in enumerate(anchors):
        b = float(operator.b[i]) + (0.8 if j == 0 else rng.normal(0.0, 0.05))
        records.append({
            "item_id": str(operator.item_ids[i]), "model": str(operator.model[i]),
            "a": _round(slope * operator.a[i] * np.exp(rng.normal(0.0, 0.03))),
            "b": _round((b - shift) / slope), "c": _round(operator.c[i]),
            "area": str(operator.area[i]), "status": "operational",
            "label": str(operator.label[i]),
        })
    areas = list(operator.areas)
    for k in range(n_new):
        area = areas[k % len(areas)]
        code = OPERATOR_AREAS[area][0]
        rec = _operator_item(rng, "3PL", OPERATOR_AREAS[area][1])
        rec.update(item_id=f"MV-{code}-N{k + 1:02d}", area=area, status="operational",
                   label=f"{OPERATOR_AREAS[area][2][k % 20]}: new form item")
        rec["b"] = _round((rec["b"] - shift) / slope)
        rec["a"] = _round(slope * rec["a"])
        records.append(rec)
    return bank_from_records(records, scaling=1.0, name="meridian_valley_new_form")


def simulate_responses(bank: ItemBank, n_persons: int, n_items: int, prefix: str,
                       seed: int) -> str:
    """A long response CSV of invented people answering ``bank`` under its own model.

    Parameters
    ----------
    bank : ItemBank
    n_persons, n_items : int
        Persons, and operational items each person answers.
    prefix : str
        Person ids are ``PREFIX-0001``, ...
    seed : int

    Returns
    -------
    str
        ``person_id,item_id,response`` rows, person by person, items in the order drawn.
    """
    rng = np.random.default_rng(seed)
    operational = np.flatnonzero(bank.status == "operational")
    theta = rng.normal(0.0, 1.0, n_persons)
    items = np.stack([rng.choice(operational, size=n_items, replace=False) for _ in range(n_persons)])
    probs = category_probabilities(bank.params.take(items), theta[:, None])  # (P, L, C)
    u = rng.random(items.shape)
    answers = np.sum(np.cumsum(probs, axis=-1)[..., :-1] < u[..., None], axis=-1)
    answers = np.minimum(answers, bank.n_categories[items] - 1)
    lines = ["person_id,item_id,response"]
    for p in range(n_persons):
        lines += [f"{prefix}-{p + 1:04d},{bank.item_ids[i]},{x}" for i, x in zip(items[p], answers[p])]
    return "\n".join(lines) + "\n"


def make_demo_banks(out_dir: str | Path = HERE) -> list[Path]:
    """Write the six demo bank files, the second licensing form and the two response files into ``out_dir``.

    Returns the paths written.

    Raises
    ------
    AdaptiveEngineError
        When ``out_dir`` is not an existing folder (nothing is written).
    """
    out_dir = Path(out_dir)
    if not out_dir.is_dir():
        raise AdaptiveEngineError(f"the output folder {out_dir} does not exist", location=str(out_dir))
    written = []
    operator, survey = make_operator_bank(), make_survey_bank()
    for bank in (operator, survey, make_operator_2d_bank()):
        for suffix in (".csv", ".json"):
            written.append(write_bank(bank, out_dir / f"{bank.name}{suffix}"))
    written.append(write_bank(make_new_form(operator), out_dir / NEW_FORM[0]))
    for bank, (name, n_persons, n_items, prefix), seed in (
            (operator, OPERATOR_RESPONSES, OPERATOR_RESPONSES_SEED),
            (survey, SURVEY_RESPONSES, SURVEY_RESPONSES_SEED)):
        text = simulate_responses(bank, n_persons, n_items, prefix, seed)
        write_text(out_dir / name, text)
        written.append(out_dir / name)
    return written


def main(argv: list[str] | None = None) -> int:
    """Command-line entry: write the demo files, print their names; exit code 2 on bad input."""
    argv = sys.argv[1:] if argv is None else argv
    try:
        written = make_demo_banks(argv[0] if argv else HERE)
    except AdaptiveEngineError as exc:
        for problem in exc.problems:
            print(f"error: {problem}", file=sys.stderr)
        return 2
    for path in written:
        print(f"wrote {path}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
