"""API shapes of the round report and the table across rounds.

Numbers that cannot be computed from the data (no labels, no training set yet) are ``None``
and come with a ``note`` saying why, so that nobody reads meaning into a missing value.
"""

from __future__ import annotations

from typing import Literal

from pydantic import BaseModel


class RateRead(BaseModel):
    """A learner-versus-expert disagreement rate with its Wilson 95% interval.

    ``rate``, ``lower`` and ``upper`` are withheld (``None``) when fewer than
    ``min_labels`` states were compared; ``note`` then says so.
    """

    count: int
    n: int
    n_excluded: int
    quoted: bool
    rate: float | None
    lower: float | None
    upper: float | None
    mean_absolute_error: list[float] | None = None
    note: str | None = None


class SampleRead(BaseModel):
    """Disagreement on one sample of the round's selection (audit or ranked)."""

    reason: Literal["audit", "ranked"]
    biased: bool
    selected: int
    disagreement: RateRead
    # split by whether the expert's answer differs from the learner's action one step before
    changed: RateRead
    unchanged: RateRead


class FeatureShiftRead(BaseModel):
    """One feature's standardised mean difference, round minus training set."""

    name: str
    unit: str
    smd: float | None
    mean_training: float
    mean_round: float
    pooled_std: float
    # why ``smd`` is missing: a feature constant in both samples at different values
    note: str | None = None


class ShiftRead(BaseModel):
    """Shift of the round's visited states away from the training set before it."""

    n_training: int
    n_round: int
    n_training_sample: int
    n_round_sample: int
    n_permutations: int
    mmd2: float | None
    p_value: float | None
    bandwidth: float | None
    features: list[FeatureShiftRead]
    note: str | None = None


class AlphaRead(BaseModel):
    """Krippendorff's alpha at one level of measurement; ``dimension`` for continuous actions."""

    dimension: str | None
    level: Literal["nominal", "interval"]
    alpha: float | None


class AgreementRead(BaseModel):
    """Annotator agreement on states with at least two votes."""

    n_states: int
    n_annotators: int
    n_votes: int
    cohen_kappa: float | None
    fleiss_kappa: float | None
    krippendorff: list[AlphaRead]
    note: str | None = None


class AnnotatorRead(BaseModel):
    """One annotator's labels in the round, agreement with consensus and pace."""

    name: str
    labels: int
    compared: int
    agreeing: int
    agreement: float | None
    labels_per_hour: float | None


class PaceRead(BaseModel):
    """Labels per active person-hour (idle gaps over 15 minutes left out)."""

    labels: int
    timed_labels: int
    active_hours: float
    labels_per_hour: float | None


class ShownHiddenRead(BaseModel):
    """Agreement of expert labels with the learner when its action was shown versus hidden."""

    n_shown: int
    n_hidden: int
    rate_shown: float | None
    rate_hidden: float | None
    difference: float | None
    lower: float | None
    upper: float | None
    note: str | None = None


class CountsRead(BaseModel):
    """How much the round holds, from upload to labels."""

    rollouts: int
    states: int
    learner_states: int
    expert_states: int
    selected: int
    selected_audit: int
    selected_ranked: int
    labels: int
    unsure_labels: int
    labelled_states: int
    multi_label_states: int


class CalibrationBinRead(BaseModel):
    low: float
    high: float
    n: int
    mean_predicted: float
    observed_rate: float


class CalibrationRead(BaseModel):
    """Predicted against observed disagreement on a sample of labelled states."""

    n: int
    brier: float | None
    expected: float
    observed: int
    bins: list[CalibrationBinRead]


class SelfTuningRead(BaseModel):
    """The disagreement model fitted when the round was ranked, and how it fared on the round's
    own audit sample (states it had not seen)."""

    used: bool
    why: str
    intercept: float | None = None
    weights: dict[str, float] | None = None
    n_labelled: int | None = None
    n_disagreements: int | None = None
    effective_n: float | None = None
    effective_disagreements: float | None = None
    effective_agreements: float | None = None
    audit_calibration: CalibrationRead | None = None


class RoundReport(BaseModel):
    """Everything the report says about one round."""

    loop: str
    round: int
    learner_version: str | None
    status: str
    action_kind: Literal["discrete", "continuous"]
    min_audit_labels: int
    counts: CountsRead
    audit: SampleRead
    ranked: SampleRead
    shift: ShiftRead
    agreement: AgreementRead
    annotators: list[AnnotatorRead]
    pace: PaceRead
    shown_vs_hidden: ShownHiddenRead
    self_tuning: SelfTuningRead | None = None


class RoundReportRow(BaseModel):
    """One round as a flat row of the table across rounds (and of the CSV)."""

    round: int
    learner_version: str | None
    status: str
    states: int
    learner_states: int
    selected_audit: int
    selected_ranked: int
    labels: int
    labelled_states: int
    audit_n: int
    audit_disagreement: float | None
    audit_lower: float | None
    audit_upper: float | None
    ranked_n: int
    ranked_disagreement: float | None
    ranked_lower: float | None
    ranked_upper: float | None
    changed_n: int
    changed_disagreement: float | None
    unchanged_n: int
    unchanged_disagreement: float | None
    shift_mmd2: float | None
    shift_p_value: float | None
    most_shifted_feature: str | None
    cohen_kappa: float | None
    fleiss_kappa: float | None
    krippendorff_alpha: float | None
    labels_per_hour: float | None
    shown_minus_hidden: float | None


class LoopReport(BaseModel):
    """The table across rounds of one loop."""

    loop: str
    title: str
    action_kind: Literal["discrete", "continuous"]
    min_audit_labels: int
    items: list[RoundReportRow]
    total: int
