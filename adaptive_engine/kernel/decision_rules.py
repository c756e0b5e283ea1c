"""The version of the decision rules, and the rule sets this engine can run.

A *decision* is anything the kernel settles for an examinee: which item comes next (and
which is withheld), the interim and final estimates, when the test stops and why, and the
final report.  :data:`DECISION_RULES_VERSION` names the rules this kernel applies.  It is
bumped whenever a change to the code could change any decision for some design, bank, seed
and answers (DEVELOPERS.md, "Decision rules and golden sequences", says when and how); the
golden sequences of ``tests/data/golden_sequences.json`` make such a change show.

The rules cover both kernels: :mod:`.cycle` hands a context of an ability vector to
:mod:`.multidimensional_cycle` (and selection to :mod:`.multidimensional_selection`), so a
change that alters a decision of a multidimensional design bumps the version just the same
(``simulations/licensing_two_dimensional.toml`` has golden sequences).

A live session is pinned to the version it started under: it resumes by replaying its
answers, which gives back its state only under the same rules.  :data:`RULE_SETS` lists
every version this engine can run: a kernel that changes a decision keeps the previous
rules installed by registering them here under their version (entry points that take the
old behaviour), so that sessions started before the change finish under the rules they
began with.

Versions:

1. The rules when versions were introduced.
2. Shadow tests whose program separates by content area are solved exactly by the batch
   solver of :mod:`.shadow`; version 1 solved every shadow test with the general 0-1
   solver, which stops once within its relative optimality gap (1e-4 by default) and so
   now and then gives a test slightly less informative than the best one, and with it
   another item (one step in 9,000 on the demo bank, one examinee in 300).  Version 1 stays
   installed: its contexts send every shadow test to the general solver.
3. The posterior on the grid is held as a density up to a factor instead of a log density
   (``TestContext.posterior_form`` ``"scaled"``; :mod:`adaptive_engine.irt.posterior`): an
   answer multiplies the row by the answer's probability row (``exp`` of the log table's
   row: a table kept for banks whose table is at most 64 MB, used by batches of more than
   one row).  The product's sum is taken first, as the sum of the row's products with the
   probability row (one ``einsum`` within the row); the product is stored in place as the
   new row and the EAP and posterior SD are read off it, divided by that sum.  The row is
   not divided by its sum: it starts summing to 1, and a row whose sum falls below 2^-100
   is multiplied by the power of two that brings its sum into [1/2, 1) (exactly).  A row
   whose sum falls below 1e-250 is redone from its logarithm (the weights ``exp(x -
   max(x))`` give the moments, and are stored divided by their sum).  (Until this was
   released the row was divided by its sum after every answer and the sum was ``np.sum``
   of the product: the EAP and SD differ from those in the last bits only.)  The EAP and
   SD agree with version 2's to about 1e-12 (rounding in the last bits), so an item or stop
   changes only where two candidates or a stopping threshold are that close.  Versions 1
   and 2 stay installed with log-form contexts (:func:`.prepared.with_log_posterior`).

   The multidimensional kernel under version 3 (:mod:`.multidimensional_state`):

   * the same scaled posterior on its product grid, normalised by multiplying by
     ``1 / total``, without the log form's e^-300 floor; the rescue of a row takes the log
     of the row before the answer plus the log-table row;
   * the moments are read off the answer's product with its sum before it is normalised;
     on a square 2-D grid from three per-row sums (another summation order than version 2);
     blocks of 64K grid values (version 2: 128K);
   * an EAP design's final EAP is its interim one once a row has answered, for every
     caller (version 2: in simulations only);
   * a MAP design keeps no grid posterior unless something reads it (KL selection, the
     SE-reduction stop); its final MAP starts from the interim MAP, not the posterior mean;
     its Newton iterations stop without taking a last step below the tolerance, and the
     covariance is the inverse information at that point;
   * a batch of one row sums its M2PL information and score in answer order, as a larger
     batch does (version 2 let numpy sum a single row pairwise once it had 8 or more
     answers, so a live MAP session could differ in the last bits from the same examinee
     simulated in a batch);
   * D-optimality's single-precision screening uses ``cosh`` where numpy vectorises it
     (AVX-512) and ``exp`` elsewhere (the double-precision values still decide the pick, so
     both give the same items);
   * KL and SE-reduction weights are the row divided by its sum;
   * on banks with M3PL or MGRM items the MAP and MLE gather the answers' parameters once
     per estimate and compute every answer's information, score and log-likelihood at
     once (:func:`.multidimensional_state.general_information_and_score`), and the criteria
     compute each kind of item apart: no numeric change (each term is computed by the
     model's operations and the sums run in answer order, as versions 1 and 2 add them
     column by column; the MLE's log-likelihood may differ from the model's only in the
     sign of a zero term), so the shipped designs decide as before; versions 1 and 2 run
     the column-by-column code unchanged.
4. The multidimensional kernel takes the one-dimensional engine's rules where they
   differed (:mod:`.multidimensional_guards` gives them in full), for every K, so that at
   K = 1 it decides as the one-dimensional engine does
   (``tests/test_multidimensional_k1_agreement.py``):

   * the MAP covariance (interim and final, every K, and the MLE's ``map`` stand-in) is
     the inverse of minus the Hessian of the log posterior at the mode (the observed
     information), not ``(P + I(theta))^-1``; the one-dimensional SE guard (``1 /
     sqrt(h)`` where the curvature ``h`` is positive and the SE below the range width
     ``w``, else ``w``) acts per eigen-direction where ``H - I / w^2`` is not positive
     definite.  On a bank of M2PL items the two informations are the same (the canonical
     link) and the covariance is version 3's bit for bit unless the prior has a direction
     of SD above ``w``; D- and A-optimality keep reading ``(P + I(theta))^-1``
     (recomputed where the state's covariance is no longer it);
   * the final report's ``estimate_status`` of an EAP or MAP estimate is ``all_lowest`` /
     ``all_highest`` / ``prior_dominated`` where those hold, as the vector library
     scoring and the one-dimensional report give them (version 3: ``converged``);
   * an MLE of a pattern mixed on every dimension at the box's edge (``at_lower_bound``,
     ``at_upper_bound``; :func:`.multidimensional_guards.every_dimension_mixed`) keeps
     the box point where the projected Newton iteration ends, its covariance
     ``I(theta)^-1`` capped as above, instead of the ``extreme_pattern_method`` stand-in;
     on banks with M3PL or MGRM items the MLE's Newton matrix is the observed information
     where it is positive definite (the one-dimensional MLE's rule; Fisher scoring
     elsewhere), which changes its path (the estimate within its tolerance) and lets it
     converge where Fisher scoring ran out of iterations (``not_converged``, the stand-in);
   * the final MLE of an all-lowest or all-highest pattern is a point of the box (each
     dimension the answered items measure at the bound towards which the likelihood rises,
     the others at the start), its covariance capped as above, as the one-dimensional final
     MLE reports its bound (version 3: the ``extreme_pattern_method`` stand-in; the interim
     estimate keeps the stand-in under both);
   * the WLE's covariance is capped as the one-dimensional WLE's SE is (at the range's
     width), as the MAP's above;
   * a K = 1 report without composite weights classifies the one dimension by the cut
     scores (version 3: no classifications).

   The shipped designs decide as under version 3 (their golden sequences are the same;
   both two-dimensional designs score by EAP).  Version 3 stays installed: its contexts
   have ``vector_rules_as_one_dimensional`` False
   (:func:`.prepared.with_version_3_vector_rules`), as have those of versions 1 and 2.
"""

from __future__ import annotations

from types import MappingProxyType
from typing import Callable, Mapping

import attrs

from . import cycle
from .prepared import build_context, with_log_posterior, with_version_3_vector_rules

#: The version of the decision rules of this kernel (a positive integer).
DECISION_RULES_VERSION = 4


@attrs.frozen(kw_only=True, eq=False)
class RuleSet:
    """The kernel entry points of one version of the decision rules.

    A driver that must honour a session's version (the live driver) calls these instead
    of the module functions of :mod:`.cycle` and :mod:`.prepared`.

    Attributes
    ----------
    version : int
        The :data:`DECISION_RULES_VERSION` these entry points implement.
    build_context : callable (design, bank) -> TestContext
    start, answer, finish, rebuild : callable
        As :func:`.cycle.start`, :func:`.cycle.answer`, :func:`.cycle.finish` and
        :func:`.cycle.rebuild`.
    """

    version: int
    build_context: Callable
    start: Callable
    answer: Callable
    finish: Callable
    rebuild: Callable


def _build_context_version_3(design, bank):
    """A context under version 3: the multidimensional kernel's rules before version 4."""
    return with_version_3_vector_rules(build_context(design, bank))


def _build_context_version_2(design, bank):
    """A context under version 2: version 3's, with the posterior as a log density."""
    return with_log_posterior(_build_context_version_3(design, bank))


def _build_context_version_1(design, bank):
    """A context under version 1: version 2's, with every shadow test by the general 0-1 solver."""
    from .shadow import with_general_solver

    return with_general_solver(_build_context_version_2(design, bank))


#: Every rule set this engine can run, by version.
RULE_SETS: Mapping[int, RuleSet] = MappingProxyType({
    1: RuleSet(version=1, build_context=_build_context_version_1, start=cycle.start, answer=cycle.answer,
               finish=cycle.finish, rebuild=cycle.rebuild),
    2: RuleSet(version=2, build_context=_build_context_version_2, start=cycle.start, answer=cycle.answer,
               finish=cycle.finish, rebuild=cycle.rebuild),
    3: RuleSet(version=3, build_context=_build_context_version_3, start=cycle.start, answer=cycle.answer,
               finish=cycle.finish, rebuild=cycle.rebuild),
    DECISION_RULES_VERSION: RuleSet(version=DECISION_RULES_VERSION, build_context=build_context,
                                    start=cycle.start, answer=cycle.answer, finish=cycle.finish,
                                    rebuild=cycle.rebuild),
})


def installed_versions() -> tuple[int, ...]:
    """The versions of the decision rules this engine can run, ascending."""
    return tuple(sorted(RULE_SETS))


def rule_set(version) -> RuleSet | None:
    """The installed rule set of ``version``, or None when this engine cannot run it.

    Parameters
    ----------
    version : int or None
        A stored version (None or anything not an installed version gives None).
    """
    if isinstance(version, bool) or not isinstance(version, int):
        return None
    return RULE_SETS.get(version)


def current_rule_set() -> RuleSet:
    """The rule set of :data:`DECISION_RULES_VERSION` (what new sessions start under)."""
    return RULE_SETS[DECISION_RULES_VERSION]
