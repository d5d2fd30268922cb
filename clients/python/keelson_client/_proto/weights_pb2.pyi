from google.protobuf.internal import containers as _containers
from google.protobuf.internal import enum_type_wrapper as _enum_type_wrapper
from google.protobuf import descriptor as _descriptor
from google.protobuf import message as _message
from typing import ClassVar as _ClassVar, Iterable as _Iterable, Mapping as _Mapping, Optional as _Optional, Union as _Union

DESCRIPTOR: _descriptor.FileDescriptor

class Scaling(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    SCALING_UNSPECIFIED: _ClassVar[Scaling]
    SCALING_SHARPE: _ClassVar[Scaling]
    SCALING_SHARPE_RAW: _ClassVar[Scaling]
    SCALING_STANDARDIZED: _ClassVar[Scaling]
    SCALING_COVARIANCE: _ClassVar[Scaling]
    SCALING_RISK_PREMIUM: _ClassVar[Scaling]
    SCALING_SHARPE_SHRUNK: _ClassVar[Scaling]
    SCALING_AUTO: _ClassVar[Scaling]

class CvCriterion(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    CV_CRITERION_UNSPECIFIED: _ClassVar[CvCriterion]
    CV_CRITERION_SHARPE: _ClassVar[CvCriterion]
    CV_CRITERION_PRICING_R2: _ClassVar[CvCriterion]
    CV_CRITERION_PRICING_R2_GLS: _ClassVar[CvCriterion]

class Normalization(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    NORMALIZATION_UNSPECIFIED: _ClassVar[Normalization]
    NORMALIZATION_TARGET_VOLATILITY: _ClassVar[Normalization]
    NORMALIZATION_RISK_AVERSION: _ClassVar[Normalization]
    NORMALIZATION_GROSS_EXPOSURE: _ClassVar[Normalization]

class MissingPolicy(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    MISSING_POLICY_UNSPECIFIED: _ClassVar[MissingPolicy]
    MISSING_POLICY_DROP_FACTOR: _ClassVar[MissingPolicy]
    MISSING_POLICY_REJECT: _ClassVar[MissingPolicy]

class Method(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    METHOD_UNSPECIFIED: _ClassVar[Method]
    METHOD_COMPONENTS: _ClassVar[Method]
    METHOD_PLUG_IN: _ClassVar[Method]
    METHOD_EQUAL_WEIGHT: _ClassVar[Method]
    METHOD_KNS_RIDGE: _ClassVar[Method]
    METHOD_PLUG_IN_LEDOIT_WOLF: _ClassVar[Method]
    METHOD_ENSEMBLE: _ClassVar[Method]
    METHOD_BLEND: _ClassVar[Method]

class RiskCalibration(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    RISK_CALIBRATION_UNSPECIFIED: _ClassVar[RiskCalibration]
    RISK_CALIBRATION_HELD_OUT: _ClassVar[RiskCalibration]
    RISK_CALIBRATION_LEDOIT_WOLF: _ClassVar[RiskCalibration]
    RISK_CALIBRATION_OFF: _ClassVar[RiskCalibration]

class Aggregate(int, metaclass=_enum_type_wrapper.EnumTypeWrapper):
    __slots__ = ()
    AGGREGATE_UNSPECIFIED: _ClassVar[Aggregate]
    AGGREGATE_POINT: _ClassVar[Aggregate]
    AGGREGATE_BAGGED: _ClassVar[Aggregate]
SCALING_UNSPECIFIED: Scaling
SCALING_SHARPE: Scaling
SCALING_SHARPE_RAW: Scaling
SCALING_STANDARDIZED: Scaling
SCALING_COVARIANCE: Scaling
SCALING_RISK_PREMIUM: Scaling
SCALING_SHARPE_SHRUNK: Scaling
SCALING_AUTO: Scaling
CV_CRITERION_UNSPECIFIED: CvCriterion
CV_CRITERION_SHARPE: CvCriterion
CV_CRITERION_PRICING_R2: CvCriterion
CV_CRITERION_PRICING_R2_GLS: CvCriterion
NORMALIZATION_UNSPECIFIED: Normalization
NORMALIZATION_TARGET_VOLATILITY: Normalization
NORMALIZATION_RISK_AVERSION: Normalization
NORMALIZATION_GROSS_EXPOSURE: Normalization
MISSING_POLICY_UNSPECIFIED: MissingPolicy
MISSING_POLICY_DROP_FACTOR: MissingPolicy
MISSING_POLICY_REJECT: MissingPolicy
METHOD_UNSPECIFIED: Method
METHOD_COMPONENTS: Method
METHOD_PLUG_IN: Method
METHOD_EQUAL_WEIGHT: Method
METHOD_KNS_RIDGE: Method
METHOD_PLUG_IN_LEDOIT_WOLF: Method
METHOD_ENSEMBLE: Method
METHOD_BLEND: Method
RISK_CALIBRATION_UNSPECIFIED: RiskCalibration
RISK_CALIBRATION_HELD_OUT: RiskCalibration
RISK_CALIBRATION_LEDOIT_WOLF: RiskCalibration
RISK_CALIBRATION_OFF: RiskCalibration
AGGREGATE_UNSPECIFIED: Aggregate
AGGREGATE_POINT: Aggregate
AGGREGATE_BAGGED: Aggregate

class Matrix(_message.Message):
    __slots__ = ("rows", "cols", "values")
    ROWS_FIELD_NUMBER: _ClassVar[int]
    COLS_FIELD_NUMBER: _ClassVar[int]
    VALUES_FIELD_NUMBER: _ClassVar[int]
    rows: int
    cols: int
    values: _containers.RepeatedScalarFieldContainer[float]
    def __init__(self, rows: _Optional[int] = ..., cols: _Optional[int] = ..., values: _Optional[_Iterable[float]] = ...) -> None: ...

class Settings(_message.Message):
    __slots__ = ("scaling", "components", "components_auto", "max_components", "kappa", "kappa_auto", "kappa_grid_min", "kappa_grid_max", "kappa_grid_points", "l1_penalty", "folds", "cv_criterion", "normalization", "target_volatility", "risk_aversion", "periods_per_year", "periods_per_year_auto", "demarket", "missing_policy", "rp_gamma", "min_periods", "method", "held_out_check", "max_weight", "max_weight_off", "max_gross", "max_gross_off", "max_market_weight", "max_market_weight_off", "max_turnover", "max_turnover_off", "cost_bps", "holding_periods", "holding_periods_auto", "volatility_halflife", "bootstrap_draws", "bootstrap_block", "bootstrap_cv", "seed", "aggregate", "risk_calibration", "frequency_check")
    SCALING_FIELD_NUMBER: _ClassVar[int]
    COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    COMPONENTS_AUTO_FIELD_NUMBER: _ClassVar[int]
    MAX_COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    KAPPA_FIELD_NUMBER: _ClassVar[int]
    KAPPA_AUTO_FIELD_NUMBER: _ClassVar[int]
    KAPPA_GRID_MIN_FIELD_NUMBER: _ClassVar[int]
    KAPPA_GRID_MAX_FIELD_NUMBER: _ClassVar[int]
    KAPPA_GRID_POINTS_FIELD_NUMBER: _ClassVar[int]
    L1_PENALTY_FIELD_NUMBER: _ClassVar[int]
    FOLDS_FIELD_NUMBER: _ClassVar[int]
    CV_CRITERION_FIELD_NUMBER: _ClassVar[int]
    NORMALIZATION_FIELD_NUMBER: _ClassVar[int]
    TARGET_VOLATILITY_FIELD_NUMBER: _ClassVar[int]
    RISK_AVERSION_FIELD_NUMBER: _ClassVar[int]
    PERIODS_PER_YEAR_FIELD_NUMBER: _ClassVar[int]
    PERIODS_PER_YEAR_AUTO_FIELD_NUMBER: _ClassVar[int]
    DEMARKET_FIELD_NUMBER: _ClassVar[int]
    MISSING_POLICY_FIELD_NUMBER: _ClassVar[int]
    RP_GAMMA_FIELD_NUMBER: _ClassVar[int]
    MIN_PERIODS_FIELD_NUMBER: _ClassVar[int]
    METHOD_FIELD_NUMBER: _ClassVar[int]
    HELD_OUT_CHECK_FIELD_NUMBER: _ClassVar[int]
    MAX_WEIGHT_FIELD_NUMBER: _ClassVar[int]
    MAX_WEIGHT_OFF_FIELD_NUMBER: _ClassVar[int]
    MAX_GROSS_FIELD_NUMBER: _ClassVar[int]
    MAX_GROSS_OFF_FIELD_NUMBER: _ClassVar[int]
    MAX_MARKET_WEIGHT_FIELD_NUMBER: _ClassVar[int]
    MAX_MARKET_WEIGHT_OFF_FIELD_NUMBER: _ClassVar[int]
    MAX_TURNOVER_FIELD_NUMBER: _ClassVar[int]
    MAX_TURNOVER_OFF_FIELD_NUMBER: _ClassVar[int]
    COST_BPS_FIELD_NUMBER: _ClassVar[int]
    HOLDING_PERIODS_FIELD_NUMBER: _ClassVar[int]
    HOLDING_PERIODS_AUTO_FIELD_NUMBER: _ClassVar[int]
    VOLATILITY_HALFLIFE_FIELD_NUMBER: _ClassVar[int]
    BOOTSTRAP_DRAWS_FIELD_NUMBER: _ClassVar[int]
    BOOTSTRAP_BLOCK_FIELD_NUMBER: _ClassVar[int]
    BOOTSTRAP_CV_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    AGGREGATE_FIELD_NUMBER: _ClassVar[int]
    RISK_CALIBRATION_FIELD_NUMBER: _ClassVar[int]
    FREQUENCY_CHECK_FIELD_NUMBER: _ClassVar[int]
    scaling: Scaling
    components: int
    components_auto: bool
    max_components: int
    kappa: float
    kappa_auto: bool
    kappa_grid_min: float
    kappa_grid_max: float
    kappa_grid_points: int
    l1_penalty: float
    folds: int
    cv_criterion: CvCriterion
    normalization: Normalization
    target_volatility: float
    risk_aversion: float
    periods_per_year: int
    periods_per_year_auto: bool
    demarket: bool
    missing_policy: MissingPolicy
    rp_gamma: float
    min_periods: int
    method: Method
    held_out_check: bool
    max_weight: float
    max_weight_off: bool
    max_gross: float
    max_gross_off: bool
    max_market_weight: float
    max_market_weight_off: bool
    max_turnover: float
    max_turnover_off: bool
    cost_bps: float
    holding_periods: float
    holding_periods_auto: bool
    volatility_halflife: float
    bootstrap_draws: int
    bootstrap_block: float
    bootstrap_cv: bool
    seed: int
    aggregate: Aggregate
    risk_calibration: RiskCalibration
    frequency_check: bool
    def __init__(self, scaling: _Optional[_Union[Scaling, str]] = ..., components: _Optional[int] = ..., components_auto: bool = ..., max_components: _Optional[int] = ..., kappa: _Optional[float] = ..., kappa_auto: bool = ..., kappa_grid_min: _Optional[float] = ..., kappa_grid_max: _Optional[float] = ..., kappa_grid_points: _Optional[int] = ..., l1_penalty: _Optional[float] = ..., folds: _Optional[int] = ..., cv_criterion: _Optional[_Union[CvCriterion, str]] = ..., normalization: _Optional[_Union[Normalization, str]] = ..., target_volatility: _Optional[float] = ..., risk_aversion: _Optional[float] = ..., periods_per_year: _Optional[int] = ..., periods_per_year_auto: bool = ..., demarket: bool = ..., missing_policy: _Optional[_Union[MissingPolicy, str]] = ..., rp_gamma: _Optional[float] = ..., min_periods: _Optional[int] = ..., method: _Optional[_Union[Method, str]] = ..., held_out_check: bool = ..., max_weight: _Optional[float] = ..., max_weight_off: bool = ..., max_gross: _Optional[float] = ..., max_gross_off: bool = ..., max_market_weight: _Optional[float] = ..., max_market_weight_off: bool = ..., max_turnover: _Optional[float] = ..., max_turnover_off: bool = ..., cost_bps: _Optional[float] = ..., holding_periods: _Optional[float] = ..., holding_periods_auto: bool = ..., volatility_halflife: _Optional[float] = ..., bootstrap_draws: _Optional[int] = ..., bootstrap_block: _Optional[float] = ..., bootstrap_cv: bool = ..., seed: _Optional[int] = ..., aggregate: _Optional[_Union[Aggregate, str]] = ..., risk_calibration: _Optional[_Union[RiskCalibration, str]] = ..., frequency_check: bool = ...) -> None: ...

class FactorWeight(_message.Message):
    __slots__ = ("factor", "weight", "mean_annualized", "volatility_annualized", "sharpe_annualized", "market_beta", "scale", "risk_contribution", "excluded", "exclusion_reason", "model_weight")
    FACTOR_FIELD_NUMBER: _ClassVar[int]
    WEIGHT_FIELD_NUMBER: _ClassVar[int]
    MEAN_ANNUALIZED_FIELD_NUMBER: _ClassVar[int]
    VOLATILITY_ANNUALIZED_FIELD_NUMBER: _ClassVar[int]
    SHARPE_ANNUALIZED_FIELD_NUMBER: _ClassVar[int]
    MARKET_BETA_FIELD_NUMBER: _ClassVar[int]
    SCALE_FIELD_NUMBER: _ClassVar[int]
    RISK_CONTRIBUTION_FIELD_NUMBER: _ClassVar[int]
    EXCLUDED_FIELD_NUMBER: _ClassVar[int]
    EXCLUSION_REASON_FIELD_NUMBER: _ClassVar[int]
    MODEL_WEIGHT_FIELD_NUMBER: _ClassVar[int]
    factor: str
    weight: float
    mean_annualized: float
    volatility_annualized: float
    sharpe_annualized: float
    market_beta: float
    scale: float
    risk_contribution: float
    excluded: bool
    exclusion_reason: str
    model_weight: float
    def __init__(self, factor: _Optional[str] = ..., weight: _Optional[float] = ..., mean_annualized: _Optional[float] = ..., volatility_annualized: _Optional[float] = ..., sharpe_annualized: _Optional[float] = ..., market_beta: _Optional[float] = ..., scale: _Optional[float] = ..., risk_contribution: _Optional[float] = ..., excluded: bool = ..., exclusion_reason: _Optional[str] = ..., model_weight: _Optional[float] = ...) -> None: ...

class ComputeWeightsRequest(_message.Message):
    __slots__ = ("factor_names", "period_labels", "returns", "market_returns", "previous_weights", "settings", "request_id", "market_name")
    FACTOR_NAMES_FIELD_NUMBER: _ClassVar[int]
    PERIOD_LABELS_FIELD_NUMBER: _ClassVar[int]
    RETURNS_FIELD_NUMBER: _ClassVar[int]
    MARKET_RETURNS_FIELD_NUMBER: _ClassVar[int]
    PREVIOUS_WEIGHTS_FIELD_NUMBER: _ClassVar[int]
    SETTINGS_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    MARKET_NAME_FIELD_NUMBER: _ClassVar[int]
    factor_names: _containers.RepeatedScalarFieldContainer[str]
    period_labels: _containers.RepeatedScalarFieldContainer[str]
    returns: Matrix
    market_returns: _containers.RepeatedScalarFieldContainer[float]
    previous_weights: _containers.RepeatedCompositeFieldContainer[FactorWeight]
    settings: Settings
    request_id: str
    market_name: str
    def __init__(self, factor_names: _Optional[_Iterable[str]] = ..., period_labels: _Optional[_Iterable[str]] = ..., returns: _Optional[_Union[Matrix, _Mapping]] = ..., market_returns: _Optional[_Iterable[float]] = ..., previous_weights: _Optional[_Iterable[_Union[FactorWeight, _Mapping]]] = ..., settings: _Optional[_Union[Settings, _Mapping]] = ..., request_id: _Optional[str] = ..., market_name: _Optional[str] = ...) -> None: ...

class ComponentDiagnostics(_message.Message):
    __slots__ = ("index", "eigenvalue", "trace_share", "sharpe_annualized", "coefficient", "shrinkage_factor", "loadings")
    INDEX_FIELD_NUMBER: _ClassVar[int]
    EIGENVALUE_FIELD_NUMBER: _ClassVar[int]
    TRACE_SHARE_FIELD_NUMBER: _ClassVar[int]
    SHARPE_ANNUALIZED_FIELD_NUMBER: _ClassVar[int]
    COEFFICIENT_FIELD_NUMBER: _ClassVar[int]
    SHRINKAGE_FACTOR_FIELD_NUMBER: _ClassVar[int]
    LOADINGS_FIELD_NUMBER: _ClassVar[int]
    index: int
    eigenvalue: float
    trace_share: float
    sharpe_annualized: float
    coefficient: float
    shrinkage_factor: float
    loadings: _containers.RepeatedScalarFieldContainer[float]
    def __init__(self, index: _Optional[int] = ..., eigenvalue: _Optional[float] = ..., trace_share: _Optional[float] = ..., sharpe_annualized: _Optional[float] = ..., coefficient: _Optional[float] = ..., shrinkage_factor: _Optional[float] = ..., loadings: _Optional[_Iterable[float]] = ...) -> None: ...

class CvSurface(_message.Message):
    __slots__ = ("components", "kappas", "scores", "criterion", "folds")
    COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    KAPPAS_FIELD_NUMBER: _ClassVar[int]
    SCORES_FIELD_NUMBER: _ClassVar[int]
    CRITERION_FIELD_NUMBER: _ClassVar[int]
    FOLDS_FIELD_NUMBER: _ClassVar[int]
    components: _containers.RepeatedScalarFieldContainer[int]
    kappas: _containers.RepeatedScalarFieldContainer[float]
    scores: Matrix
    criterion: CvCriterion
    folds: int
    def __init__(self, components: _Optional[_Iterable[int]] = ..., kappas: _Optional[_Iterable[float]] = ..., scores: _Optional[_Union[Matrix, _Mapping]] = ..., criterion: _Optional[_Union[CvCriterion, str]] = ..., folds: _Optional[int] = ...) -> None: ...

class ExcludedFactor(_message.Message):
    __slots__ = ("factor", "reason", "code")
    FACTOR_FIELD_NUMBER: _ClassVar[int]
    REASON_FIELD_NUMBER: _ClassVar[int]
    CODE_FIELD_NUMBER: _ClassVar[int]
    factor: str
    reason: str
    code: str
    def __init__(self, factor: _Optional[str] = ..., reason: _Optional[str] = ..., code: _Optional[str] = ...) -> None: ...

class Warning(_message.Message):
    __slots__ = ("code", "message")
    CODE_FIELD_NUMBER: _ClassVar[int]
    MESSAGE_FIELD_NUMBER: _ClassVar[int]
    code: str
    message: str
    def __init__(self, code: _Optional[str] = ..., message: _Optional[str] = ...) -> None: ...

class Diagnostics(_message.Message):
    __slots__ = ("num_components", "kappa", "gamma", "components_cross_validated", "kappa_cross_validated", "cv_surface", "cv_best_score", "cv_sharpe", "in_sample_sharpe", "ex_ante_volatility", "effective_factors", "top_sharpe_gross_share", "turnover", "covariance_condition_number", "excluded", "warnings", "periods", "factors_used", "effective_settings", "implementation", "chosen_scaling", "scaling_scores", "bootstrap", "risk_calibration", "periods_per_year", "periods_per_year_inferred")
    NUM_COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    KAPPA_FIELD_NUMBER: _ClassVar[int]
    GAMMA_FIELD_NUMBER: _ClassVar[int]
    COMPONENTS_CROSS_VALIDATED_FIELD_NUMBER: _ClassVar[int]
    KAPPA_CROSS_VALIDATED_FIELD_NUMBER: _ClassVar[int]
    CV_SURFACE_FIELD_NUMBER: _ClassVar[int]
    CV_BEST_SCORE_FIELD_NUMBER: _ClassVar[int]
    CV_SHARPE_FIELD_NUMBER: _ClassVar[int]
    IN_SAMPLE_SHARPE_FIELD_NUMBER: _ClassVar[int]
    EX_ANTE_VOLATILITY_FIELD_NUMBER: _ClassVar[int]
    EFFECTIVE_FACTORS_FIELD_NUMBER: _ClassVar[int]
    TOP_SHARPE_GROSS_SHARE_FIELD_NUMBER: _ClassVar[int]
    TURNOVER_FIELD_NUMBER: _ClassVar[int]
    COVARIANCE_CONDITION_NUMBER_FIELD_NUMBER: _ClassVar[int]
    EXCLUDED_FIELD_NUMBER: _ClassVar[int]
    WARNINGS_FIELD_NUMBER: _ClassVar[int]
    PERIODS_FIELD_NUMBER: _ClassVar[int]
    FACTORS_USED_FIELD_NUMBER: _ClassVar[int]
    EFFECTIVE_SETTINGS_FIELD_NUMBER: _ClassVar[int]
    IMPLEMENTATION_FIELD_NUMBER: _ClassVar[int]
    CHOSEN_SCALING_FIELD_NUMBER: _ClassVar[int]
    SCALING_SCORES_FIELD_NUMBER: _ClassVar[int]
    BOOTSTRAP_FIELD_NUMBER: _ClassVar[int]
    RISK_CALIBRATION_FIELD_NUMBER: _ClassVar[int]
    PERIODS_PER_YEAR_FIELD_NUMBER: _ClassVar[int]
    PERIODS_PER_YEAR_INFERRED_FIELD_NUMBER: _ClassVar[int]
    num_components: int
    kappa: float
    gamma: float
    components_cross_validated: bool
    kappa_cross_validated: bool
    cv_surface: CvSurface
    cv_best_score: float
    cv_sharpe: float
    in_sample_sharpe: float
    ex_ante_volatility: float
    effective_factors: float
    top_sharpe_gross_share: float
    turnover: float
    covariance_condition_number: float
    excluded: _containers.RepeatedCompositeFieldContainer[ExcludedFactor]
    warnings: _containers.RepeatedCompositeFieldContainer[Warning]
    periods: int
    factors_used: int
    effective_settings: Settings
    implementation: Implementation
    chosen_scaling: Scaling
    scaling_scores: _containers.RepeatedCompositeFieldContainer[ScalingScore]
    bootstrap: Bootstrap
    risk_calibration: RiskCalibrationReport
    periods_per_year: int
    periods_per_year_inferred: bool
    def __init__(self, num_components: _Optional[int] = ..., kappa: _Optional[float] = ..., gamma: _Optional[float] = ..., components_cross_validated: bool = ..., kappa_cross_validated: bool = ..., cv_surface: _Optional[_Union[CvSurface, _Mapping]] = ..., cv_best_score: _Optional[float] = ..., cv_sharpe: _Optional[float] = ..., in_sample_sharpe: _Optional[float] = ..., ex_ante_volatility: _Optional[float] = ..., effective_factors: _Optional[float] = ..., top_sharpe_gross_share: _Optional[float] = ..., turnover: _Optional[float] = ..., covariance_condition_number: _Optional[float] = ..., excluded: _Optional[_Iterable[_Union[ExcludedFactor, _Mapping]]] = ..., warnings: _Optional[_Iterable[_Union[Warning, _Mapping]]] = ..., periods: _Optional[int] = ..., factors_used: _Optional[int] = ..., effective_settings: _Optional[_Union[Settings, _Mapping]] = ..., implementation: _Optional[_Union[Implementation, _Mapping]] = ..., chosen_scaling: _Optional[_Union[Scaling, str]] = ..., scaling_scores: _Optional[_Iterable[_Union[ScalingScore, _Mapping]]] = ..., bootstrap: _Optional[_Union[Bootstrap, _Mapping]] = ..., risk_calibration: _Optional[_Union[RiskCalibrationReport, _Mapping]] = ..., periods_per_year: _Optional[int] = ..., periods_per_year_inferred: bool = ...) -> None: ...

class RiskCalibrationReport(_message.Message):
    __slots__ = ("rule", "factor", "measured_ratio", "standard_error", "held_out_periods", "in_window_volatility", "calibrated_volatility", "limited")
    RULE_FIELD_NUMBER: _ClassVar[int]
    FACTOR_FIELD_NUMBER: _ClassVar[int]
    MEASURED_RATIO_FIELD_NUMBER: _ClassVar[int]
    STANDARD_ERROR_FIELD_NUMBER: _ClassVar[int]
    HELD_OUT_PERIODS_FIELD_NUMBER: _ClassVar[int]
    IN_WINDOW_VOLATILITY_FIELD_NUMBER: _ClassVar[int]
    CALIBRATED_VOLATILITY_FIELD_NUMBER: _ClassVar[int]
    LIMITED_FIELD_NUMBER: _ClassVar[int]
    rule: RiskCalibration
    factor: float
    measured_ratio: float
    standard_error: float
    held_out_periods: int
    in_window_volatility: float
    calibrated_volatility: float
    limited: bool
    def __init__(self, rule: _Optional[_Union[RiskCalibration, str]] = ..., factor: _Optional[float] = ..., measured_ratio: _Optional[float] = ..., standard_error: _Optional[float] = ..., held_out_periods: _Optional[int] = ..., in_window_volatility: _Optional[float] = ..., calibrated_volatility: _Optional[float] = ..., limited: bool = ...) -> None: ...

class FactorInterval(_message.Message):
    __slots__ = ("factor", "q05", "q50", "q95", "sign_agreement")
    FACTOR_FIELD_NUMBER: _ClassVar[int]
    Q05_FIELD_NUMBER: _ClassVar[int]
    Q50_FIELD_NUMBER: _ClassVar[int]
    Q95_FIELD_NUMBER: _ClassVar[int]
    SIGN_AGREEMENT_FIELD_NUMBER: _ClassVar[int]
    factor: str
    q05: float
    q50: float
    q95: float
    sign_agreement: float
    def __init__(self, factor: _Optional[str] = ..., q05: _Optional[float] = ..., q50: _Optional[float] = ..., q95: _Optional[float] = ..., sign_agreement: _Optional[float] = ...) -> None: ...

class ComponentCount(_message.Message):
    __slots__ = ("components", "draws")
    COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    DRAWS_FIELD_NUMBER: _ClassVar[int]
    components: int
    draws: int
    def __init__(self, components: _Optional[int] = ..., draws: _Optional[int] = ...) -> None: ...

class Bootstrap(_message.Message):
    __slots__ = ("draws", "failed", "mean_block", "seed", "cross_validated", "bagged", "factors", "components")
    DRAWS_FIELD_NUMBER: _ClassVar[int]
    FAILED_FIELD_NUMBER: _ClassVar[int]
    MEAN_BLOCK_FIELD_NUMBER: _ClassVar[int]
    SEED_FIELD_NUMBER: _ClassVar[int]
    CROSS_VALIDATED_FIELD_NUMBER: _ClassVar[int]
    BAGGED_FIELD_NUMBER: _ClassVar[int]
    FACTORS_FIELD_NUMBER: _ClassVar[int]
    COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    draws: int
    failed: int
    mean_block: float
    seed: int
    cross_validated: bool
    bagged: bool
    factors: _containers.RepeatedCompositeFieldContainer[FactorInterval]
    components: _containers.RepeatedCompositeFieldContainer[ComponentCount]
    def __init__(self, draws: _Optional[int] = ..., failed: _Optional[int] = ..., mean_block: _Optional[float] = ..., seed: _Optional[int] = ..., cross_validated: bool = ..., bagged: bool = ..., factors: _Optional[_Iterable[_Union[FactorInterval, _Mapping]]] = ..., components: _Optional[_Iterable[_Union[ComponentCount, _Mapping]]] = ...) -> None: ...

class ScalingScore(_message.Message):
    __slots__ = ("scaling", "best_score", "components", "kappa")
    SCALING_FIELD_NUMBER: _ClassVar[int]
    BEST_SCORE_FIELD_NUMBER: _ClassVar[int]
    COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    KAPPA_FIELD_NUMBER: _ClassVar[int]
    scaling: Scaling
    best_score: float
    components: int
    kappa: float
    def __init__(self, scaling: _Optional[_Union[Scaling, str]] = ..., best_score: _Optional[float] = ..., components: _Optional[int] = ..., kappa: _Optional[float] = ...) -> None: ...

class BindingConstraint(_message.Message):
    __slots__ = ("constraint", "factor", "value", "limit", "dual")
    CONSTRAINT_FIELD_NUMBER: _ClassVar[int]
    FACTOR_FIELD_NUMBER: _ClassVar[int]
    VALUE_FIELD_NUMBER: _ClassVar[int]
    LIMIT_FIELD_NUMBER: _ClassVar[int]
    DUAL_FIELD_NUMBER: _ClassVar[int]
    constraint: str
    factor: str
    value: float
    limit: float
    dual: float
    def __init__(self, constraint: _Optional[str] = ..., factor: _Optional[str] = ..., value: _Optional[float] = ..., limit: _Optional[float] = ..., dual: _Optional[float] = ...) -> None: ...

class Implementation(_message.Message):
    __slots__ = ("tracking_error", "turnover", "cost", "gross", "model_gross", "gamma", "model_sharpe", "binding", "solver_status", "iterations", "omega_form", "dust_cleared")
    TRACKING_ERROR_FIELD_NUMBER: _ClassVar[int]
    TURNOVER_FIELD_NUMBER: _ClassVar[int]
    COST_FIELD_NUMBER: _ClassVar[int]
    GROSS_FIELD_NUMBER: _ClassVar[int]
    MODEL_GROSS_FIELD_NUMBER: _ClassVar[int]
    GAMMA_FIELD_NUMBER: _ClassVar[int]
    MODEL_SHARPE_FIELD_NUMBER: _ClassVar[int]
    BINDING_FIELD_NUMBER: _ClassVar[int]
    SOLVER_STATUS_FIELD_NUMBER: _ClassVar[int]
    ITERATIONS_FIELD_NUMBER: _ClassVar[int]
    OMEGA_FORM_FIELD_NUMBER: _ClassVar[int]
    DUST_CLEARED_FIELD_NUMBER: _ClassVar[int]
    tracking_error: float
    turnover: float
    cost: float
    gross: float
    model_gross: float
    gamma: float
    model_sharpe: float
    binding: _containers.RepeatedCompositeFieldContainer[BindingConstraint]
    solver_status: str
    iterations: int
    omega_form: str
    dust_cleared: int
    def __init__(self, tracking_error: _Optional[float] = ..., turnover: _Optional[float] = ..., cost: _Optional[float] = ..., gross: _Optional[float] = ..., model_gross: _Optional[float] = ..., gamma: _Optional[float] = ..., model_sharpe: _Optional[float] = ..., binding: _Optional[_Iterable[_Union[BindingConstraint, _Mapping]]] = ..., solver_status: _Optional[str] = ..., iterations: _Optional[int] = ..., omega_form: _Optional[str] = ..., dust_cleared: _Optional[int] = ...) -> None: ...

class ComputeWeightsResponse(_message.Message):
    __slots__ = ("weights", "market_weight", "model_market_weight", "components", "diagnostics", "fingerprint", "estimator_version", "request_id")
    WEIGHTS_FIELD_NUMBER: _ClassVar[int]
    MARKET_WEIGHT_FIELD_NUMBER: _ClassVar[int]
    MODEL_MARKET_WEIGHT_FIELD_NUMBER: _ClassVar[int]
    COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    DIAGNOSTICS_FIELD_NUMBER: _ClassVar[int]
    FINGERPRINT_FIELD_NUMBER: _ClassVar[int]
    ESTIMATOR_VERSION_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    weights: _containers.RepeatedCompositeFieldContainer[FactorWeight]
    market_weight: float
    model_market_weight: float
    components: _containers.RepeatedCompositeFieldContainer[ComponentDiagnostics]
    diagnostics: Diagnostics
    fingerprint: str
    estimator_version: str
    request_id: str
    def __init__(self, weights: _Optional[_Iterable[_Union[FactorWeight, _Mapping]]] = ..., market_weight: _Optional[float] = ..., model_market_weight: _Optional[float] = ..., components: _Optional[_Iterable[_Union[ComponentDiagnostics, _Mapping]]] = ..., diagnostics: _Optional[_Union[Diagnostics, _Mapping]] = ..., fingerprint: _Optional[str] = ..., estimator_version: _Optional[str] = ..., request_id: _Optional[str] = ...) -> None: ...

class GetServiceInfoRequest(_message.Message):
    __slots__ = ()
    def __init__(self) -> None: ...

class ServiceLimits(_message.Message):
    __slots__ = ("max_message_bytes", "max_cells", "max_factors", "max_in_flight", "workers", "request_timeout_ms", "backtest_timeout_ms", "max_backtest_fits", "max_request_bytes_estimate", "max_stage_factors", "max_stage_cells")
    MAX_MESSAGE_BYTES_FIELD_NUMBER: _ClassVar[int]
    MAX_CELLS_FIELD_NUMBER: _ClassVar[int]
    MAX_FACTORS_FIELD_NUMBER: _ClassVar[int]
    MAX_IN_FLIGHT_FIELD_NUMBER: _ClassVar[int]
    WORKERS_FIELD_NUMBER: _ClassVar[int]
    REQUEST_TIMEOUT_MS_FIELD_NUMBER: _ClassVar[int]
    BACKTEST_TIMEOUT_MS_FIELD_NUMBER: _ClassVar[int]
    MAX_BACKTEST_FITS_FIELD_NUMBER: _ClassVar[int]
    MAX_REQUEST_BYTES_ESTIMATE_FIELD_NUMBER: _ClassVar[int]
    MAX_STAGE_FACTORS_FIELD_NUMBER: _ClassVar[int]
    MAX_STAGE_CELLS_FIELD_NUMBER: _ClassVar[int]
    max_message_bytes: int
    max_cells: int
    max_factors: int
    max_in_flight: int
    workers: int
    request_timeout_ms: int
    backtest_timeout_ms: int
    max_backtest_fits: int
    max_request_bytes_estimate: int
    max_stage_factors: int
    max_stage_cells: int
    def __init__(self, max_message_bytes: _Optional[int] = ..., max_cells: _Optional[int] = ..., max_factors: _Optional[int] = ..., max_in_flight: _Optional[int] = ..., workers: _Optional[int] = ..., request_timeout_ms: _Optional[int] = ..., backtest_timeout_ms: _Optional[int] = ..., max_backtest_fits: _Optional[int] = ..., max_request_bytes_estimate: _Optional[int] = ..., max_stage_factors: _Optional[int] = ..., max_stage_cells: _Optional[int] = ...) -> None: ...

class GetServiceInfoResponse(_message.Message):
    __slots__ = ("estimator_version", "server_version", "default_settings", "limits", "settings")
    ESTIMATOR_VERSION_FIELD_NUMBER: _ClassVar[int]
    SERVER_VERSION_FIELD_NUMBER: _ClassVar[int]
    DEFAULT_SETTINGS_FIELD_NUMBER: _ClassVar[int]
    LIMITS_FIELD_NUMBER: _ClassVar[int]
    SETTINGS_FIELD_NUMBER: _ClassVar[int]
    estimator_version: str
    server_version: str
    default_settings: Settings
    limits: ServiceLimits
    settings: _containers.RepeatedCompositeFieldContainer[SettingDescription]
    def __init__(self, estimator_version: _Optional[str] = ..., server_version: _Optional[str] = ..., default_settings: _Optional[_Union[Settings, _Mapping]] = ..., limits: _Optional[_Union[ServiceLimits, _Mapping]] = ..., settings: _Optional[_Iterable[_Union[SettingDescription, _Mapping]]] = ...) -> None: ...

class SettingDescription(_message.Message):
    __slots__ = ("name", "default_value", "range", "meaning")
    NAME_FIELD_NUMBER: _ClassVar[int]
    DEFAULT_VALUE_FIELD_NUMBER: _ClassVar[int]
    RANGE_FIELD_NUMBER: _ClassVar[int]
    MEANING_FIELD_NUMBER: _ClassVar[int]
    name: str
    default_value: str
    range: str
    meaning: str
    def __init__(self, name: _Optional[str] = ..., default_value: _Optional[str] = ..., range: _Optional[str] = ..., meaning: _Optional[str] = ...) -> None: ...

class BenchmarkSet(_message.Message):
    __slots__ = ("names",)
    NAMES_FIELD_NUMBER: _ClassVar[int]
    names: _containers.RepeatedScalarFieldContainer[str]
    def __init__(self, names: _Optional[_Iterable[str]] = ...) -> None: ...

class RunBacktestRequest(_message.Message):
    __slots__ = ("factor_names", "period_labels", "returns", "market_returns", "settings", "window", "expanding", "step", "cost_bps", "cer_risk_aversion", "sweep_max_k", "benchmark_sets", "skip_baselines", "request_id")
    FACTOR_NAMES_FIELD_NUMBER: _ClassVar[int]
    PERIOD_LABELS_FIELD_NUMBER: _ClassVar[int]
    RETURNS_FIELD_NUMBER: _ClassVar[int]
    MARKET_RETURNS_FIELD_NUMBER: _ClassVar[int]
    SETTINGS_FIELD_NUMBER: _ClassVar[int]
    WINDOW_FIELD_NUMBER: _ClassVar[int]
    EXPANDING_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    COST_BPS_FIELD_NUMBER: _ClassVar[int]
    CER_RISK_AVERSION_FIELD_NUMBER: _ClassVar[int]
    SWEEP_MAX_K_FIELD_NUMBER: _ClassVar[int]
    BENCHMARK_SETS_FIELD_NUMBER: _ClassVar[int]
    SKIP_BASELINES_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    factor_names: _containers.RepeatedScalarFieldContainer[str]
    period_labels: _containers.RepeatedScalarFieldContainer[str]
    returns: Matrix
    market_returns: _containers.RepeatedScalarFieldContainer[float]
    settings: Settings
    window: int
    expanding: bool
    step: int
    cost_bps: float
    cer_risk_aversion: float
    sweep_max_k: int
    benchmark_sets: _containers.RepeatedCompositeFieldContainer[BenchmarkSet]
    skip_baselines: bool
    request_id: str
    def __init__(self, factor_names: _Optional[_Iterable[str]] = ..., period_labels: _Optional[_Iterable[str]] = ..., returns: _Optional[_Union[Matrix, _Mapping]] = ..., market_returns: _Optional[_Iterable[float]] = ..., settings: _Optional[_Union[Settings, _Mapping]] = ..., window: _Optional[int] = ..., expanding: bool = ..., step: _Optional[int] = ..., cost_bps: _Optional[float] = ..., cer_risk_aversion: _Optional[float] = ..., sweep_max_k: _Optional[int] = ..., benchmark_sets: _Optional[_Iterable[_Union[BenchmarkSet, _Mapping]]] = ..., skip_baselines: bool = ..., request_id: _Optional[str] = ...) -> None: ...

class BacktestProgress(_message.Message):
    __slots__ = ("fits_done", "fits_total")
    FITS_DONE_FIELD_NUMBER: _ClassVar[int]
    FITS_TOTAL_FIELD_NUMBER: _ClassVar[int]
    fits_done: int
    fits_total: int
    def __init__(self, fits_done: _Optional[int] = ..., fits_total: _Optional[int] = ...) -> None: ...

class StrategyPerformance(_message.Message):
    __slots__ = ("name", "returns", "net_returns", "mean", "volatility", "sharpe", "sharpe_se_iid", "sharpe_se_newey_west", "cer", "max_drawdown", "net_sharpe", "average_turnover", "chosen_components", "chosen_kappa", "top_sharpe_share", "gross_median", "gross_max", "target_volatility", "kappa_at_edge", "components_at_cap", "id", "settings", "warnings", "skewness", "kurtosis", "missing_holding_returns", "limit_bound_refits", "binding_limits")
    NAME_FIELD_NUMBER: _ClassVar[int]
    RETURNS_FIELD_NUMBER: _ClassVar[int]
    NET_RETURNS_FIELD_NUMBER: _ClassVar[int]
    MEAN_FIELD_NUMBER: _ClassVar[int]
    VOLATILITY_FIELD_NUMBER: _ClassVar[int]
    SHARPE_FIELD_NUMBER: _ClassVar[int]
    SHARPE_SE_IID_FIELD_NUMBER: _ClassVar[int]
    SHARPE_SE_NEWEY_WEST_FIELD_NUMBER: _ClassVar[int]
    CER_FIELD_NUMBER: _ClassVar[int]
    MAX_DRAWDOWN_FIELD_NUMBER: _ClassVar[int]
    NET_SHARPE_FIELD_NUMBER: _ClassVar[int]
    AVERAGE_TURNOVER_FIELD_NUMBER: _ClassVar[int]
    CHOSEN_COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    CHOSEN_KAPPA_FIELD_NUMBER: _ClassVar[int]
    TOP_SHARPE_SHARE_FIELD_NUMBER: _ClassVar[int]
    GROSS_MEDIAN_FIELD_NUMBER: _ClassVar[int]
    GROSS_MAX_FIELD_NUMBER: _ClassVar[int]
    TARGET_VOLATILITY_FIELD_NUMBER: _ClassVar[int]
    KAPPA_AT_EDGE_FIELD_NUMBER: _ClassVar[int]
    COMPONENTS_AT_CAP_FIELD_NUMBER: _ClassVar[int]
    ID_FIELD_NUMBER: _ClassVar[int]
    SETTINGS_FIELD_NUMBER: _ClassVar[int]
    WARNINGS_FIELD_NUMBER: _ClassVar[int]
    SKEWNESS_FIELD_NUMBER: _ClassVar[int]
    KURTOSIS_FIELD_NUMBER: _ClassVar[int]
    MISSING_HOLDING_RETURNS_FIELD_NUMBER: _ClassVar[int]
    LIMIT_BOUND_REFITS_FIELD_NUMBER: _ClassVar[int]
    BINDING_LIMITS_FIELD_NUMBER: _ClassVar[int]
    name: str
    returns: _containers.RepeatedScalarFieldContainer[float]
    net_returns: _containers.RepeatedScalarFieldContainer[float]
    mean: float
    volatility: float
    sharpe: float
    sharpe_se_iid: float
    sharpe_se_newey_west: float
    cer: float
    max_drawdown: float
    net_sharpe: float
    average_turnover: float
    chosen_components: _containers.RepeatedScalarFieldContainer[int]
    chosen_kappa: _containers.RepeatedScalarFieldContainer[float]
    top_sharpe_share: _containers.RepeatedScalarFieldContainer[float]
    gross_median: float
    gross_max: float
    target_volatility: float
    kappa_at_edge: int
    components_at_cap: int
    id: str
    settings: Settings
    warnings: _containers.RepeatedCompositeFieldContainer[WarningCount]
    skewness: float
    kurtosis: float
    missing_holding_returns: int
    limit_bound_refits: int
    binding_limits: _containers.RepeatedCompositeFieldContainer[LimitCount]
    def __init__(self, name: _Optional[str] = ..., returns: _Optional[_Iterable[float]] = ..., net_returns: _Optional[_Iterable[float]] = ..., mean: _Optional[float] = ..., volatility: _Optional[float] = ..., sharpe: _Optional[float] = ..., sharpe_se_iid: _Optional[float] = ..., sharpe_se_newey_west: _Optional[float] = ..., cer: _Optional[float] = ..., max_drawdown: _Optional[float] = ..., net_sharpe: _Optional[float] = ..., average_turnover: _Optional[float] = ..., chosen_components: _Optional[_Iterable[int]] = ..., chosen_kappa: _Optional[_Iterable[float]] = ..., top_sharpe_share: _Optional[_Iterable[float]] = ..., gross_median: _Optional[float] = ..., gross_max: _Optional[float] = ..., target_volatility: _Optional[float] = ..., kappa_at_edge: _Optional[int] = ..., components_at_cap: _Optional[int] = ..., id: _Optional[str] = ..., settings: _Optional[_Union[Settings, _Mapping]] = ..., warnings: _Optional[_Iterable[_Union[WarningCount, _Mapping]]] = ..., skewness: _Optional[float] = ..., kurtosis: _Optional[float] = ..., missing_holding_returns: _Optional[int] = ..., limit_bound_refits: _Optional[int] = ..., binding_limits: _Optional[_Iterable[_Union[LimitCount, _Mapping]]] = ...) -> None: ...

class LimitCount(_message.Message):
    __slots__ = ("limit", "refits")
    LIMIT_FIELD_NUMBER: _ClassVar[int]
    REFITS_FIELD_NUMBER: _ClassVar[int]
    limit: str
    refits: int
    def __init__(self, limit: _Optional[str] = ..., refits: _Optional[int] = ...) -> None: ...

class WarningCount(_message.Message):
    __slots__ = ("code", "refits")
    CODE_FIELD_NUMBER: _ClassVar[int]
    REFITS_FIELD_NUMBER: _ClassVar[int]
    code: str
    refits: int
    def __init__(self, code: _Optional[str] = ..., refits: _Optional[int] = ...) -> None: ...

class BacktestOptions(_message.Message):
    __slots__ = ("window", "expanding", "step", "cost_bps", "cer_risk_aversion", "sweep_max_k", "benchmark_sets", "baselines", "periods_per_year")
    WINDOW_FIELD_NUMBER: _ClassVar[int]
    EXPANDING_FIELD_NUMBER: _ClassVar[int]
    STEP_FIELD_NUMBER: _ClassVar[int]
    COST_BPS_FIELD_NUMBER: _ClassVar[int]
    CER_RISK_AVERSION_FIELD_NUMBER: _ClassVar[int]
    SWEEP_MAX_K_FIELD_NUMBER: _ClassVar[int]
    BENCHMARK_SETS_FIELD_NUMBER: _ClassVar[int]
    BASELINES_FIELD_NUMBER: _ClassVar[int]
    PERIODS_PER_YEAR_FIELD_NUMBER: _ClassVar[int]
    window: int
    expanding: bool
    step: int
    cost_bps: float
    cer_risk_aversion: float
    sweep_max_k: int
    benchmark_sets: _containers.RepeatedCompositeFieldContainer[BenchmarkSet]
    baselines: bool
    periods_per_year: int
    def __init__(self, window: _Optional[int] = ..., expanding: bool = ..., step: _Optional[int] = ..., cost_bps: _Optional[float] = ..., cer_risk_aversion: _Optional[float] = ..., sweep_max_k: _Optional[int] = ..., benchmark_sets: _Optional[_Iterable[_Union[BenchmarkSet, _Mapping]]] = ..., baselines: bool = ..., periods_per_year: _Optional[int] = ...) -> None: ...

class Provenance(_message.Message):
    __slots__ = ("keelson_version", "estimator_version", "run_time", "invocation", "input", "input_sha256", "first_period", "last_period", "periods", "factors", "market", "configured")
    KEELSON_VERSION_FIELD_NUMBER: _ClassVar[int]
    ESTIMATOR_VERSION_FIELD_NUMBER: _ClassVar[int]
    RUN_TIME_FIELD_NUMBER: _ClassVar[int]
    INVOCATION_FIELD_NUMBER: _ClassVar[int]
    INPUT_FIELD_NUMBER: _ClassVar[int]
    INPUT_SHA256_FIELD_NUMBER: _ClassVar[int]
    FIRST_PERIOD_FIELD_NUMBER: _ClassVar[int]
    LAST_PERIOD_FIELD_NUMBER: _ClassVar[int]
    PERIODS_FIELD_NUMBER: _ClassVar[int]
    FACTORS_FIELD_NUMBER: _ClassVar[int]
    MARKET_FIELD_NUMBER: _ClassVar[int]
    CONFIGURED_FIELD_NUMBER: _ClassVar[int]
    keelson_version: str
    estimator_version: str
    run_time: str
    invocation: str
    input: str
    input_sha256: str
    first_period: str
    last_period: str
    periods: int
    factors: int
    market: str
    configured: str
    def __init__(self, keelson_version: _Optional[str] = ..., estimator_version: _Optional[str] = ..., run_time: _Optional[str] = ..., invocation: _Optional[str] = ..., input: _Optional[str] = ..., input_sha256: _Optional[str] = ..., first_period: _Optional[str] = ..., last_period: _Optional[str] = ..., periods: _Optional[int] = ..., factors: _Optional[int] = ..., market: _Optional[str] = ..., configured: _Optional[str] = ...) -> None: ...

class SweepPoint(_message.Message):
    __slots__ = ("scaling", "components", "sharpe")
    SCALING_FIELD_NUMBER: _ClassVar[int]
    COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    SHARPE_FIELD_NUMBER: _ClassVar[int]
    scaling: Scaling
    components: int
    sharpe: float
    def __init__(self, scaling: _Optional[_Union[Scaling, str]] = ..., components: _Optional[int] = ..., sharpe: _Optional[float] = ...) -> None: ...

class SharpeComparison(_message.Message):
    __slots__ = ("against", "difference", "z", "p_value", "p_value_holm", "p_value_romano_wolf")
    AGAINST_FIELD_NUMBER: _ClassVar[int]
    DIFFERENCE_FIELD_NUMBER: _ClassVar[int]
    Z_FIELD_NUMBER: _ClassVar[int]
    P_VALUE_FIELD_NUMBER: _ClassVar[int]
    P_VALUE_HOLM_FIELD_NUMBER: _ClassVar[int]
    P_VALUE_ROMANO_WOLF_FIELD_NUMBER: _ClassVar[int]
    against: str
    difference: float
    z: float
    p_value: float
    p_value_holm: float
    p_value_romano_wolf: float
    def __init__(self, against: _Optional[str] = ..., difference: _Optional[float] = ..., z: _Optional[float] = ..., p_value: _Optional[float] = ..., p_value_holm: _Optional[float] = ..., p_value_romano_wolf: _Optional[float] = ...) -> None: ...

class AlphaTest(_message.Message):
    __slots__ = ("strategy", "benchmarks", "alpha", "t_newey_west", "t_robust", "r_squared", "note")
    STRATEGY_FIELD_NUMBER: _ClassVar[int]
    BENCHMARKS_FIELD_NUMBER: _ClassVar[int]
    ALPHA_FIELD_NUMBER: _ClassVar[int]
    T_NEWEY_WEST_FIELD_NUMBER: _ClassVar[int]
    T_ROBUST_FIELD_NUMBER: _ClassVar[int]
    R_SQUARED_FIELD_NUMBER: _ClassVar[int]
    NOTE_FIELD_NUMBER: _ClassVar[int]
    strategy: str
    benchmarks: _containers.RepeatedScalarFieldContainer[str]
    alpha: float
    t_newey_west: float
    t_robust: float
    r_squared: float
    note: str
    def __init__(self, strategy: _Optional[str] = ..., benchmarks: _Optional[_Iterable[str]] = ..., alpha: _Optional[float] = ..., t_newey_west: _Optional[float] = ..., t_robust: _Optional[float] = ..., r_squared: _Optional[float] = ..., note: _Optional[str] = ...) -> None: ...

class PricingTest(_message.Message):
    __slots__ = ("components", "assets", "significant", "grs", "grs_p_value")
    COMPONENTS_FIELD_NUMBER: _ClassVar[int]
    ASSETS_FIELD_NUMBER: _ClassVar[int]
    SIGNIFICANT_FIELD_NUMBER: _ClassVar[int]
    GRS_FIELD_NUMBER: _ClassVar[int]
    GRS_P_VALUE_FIELD_NUMBER: _ClassVar[int]
    components: int
    assets: int
    significant: int
    grs: float
    grs_p_value: float
    def __init__(self, components: _Optional[int] = ..., assets: _Optional[int] = ..., significant: _Optional[int] = ..., grs: _Optional[float] = ..., grs_p_value: _Optional[float] = ...) -> None: ...

class BacktestResult(_message.Message):
    __slots__ = ("periods", "refits", "strategies", "sweep", "comparisons", "probabilistic_sharpe", "deflated_sharpe", "trials", "alphas", "pricing", "newey_west_lag", "latest_fit", "options", "provenance", "latest_fit_first_period", "latest_fit_last_period", "trial_names", "verdict")
    PERIODS_FIELD_NUMBER: _ClassVar[int]
    REFITS_FIELD_NUMBER: _ClassVar[int]
    STRATEGIES_FIELD_NUMBER: _ClassVar[int]
    SWEEP_FIELD_NUMBER: _ClassVar[int]
    COMPARISONS_FIELD_NUMBER: _ClassVar[int]
    PROBABILISTIC_SHARPE_FIELD_NUMBER: _ClassVar[int]
    DEFLATED_SHARPE_FIELD_NUMBER: _ClassVar[int]
    TRIALS_FIELD_NUMBER: _ClassVar[int]
    ALPHAS_FIELD_NUMBER: _ClassVar[int]
    PRICING_FIELD_NUMBER: _ClassVar[int]
    NEWEY_WEST_LAG_FIELD_NUMBER: _ClassVar[int]
    LATEST_FIT_FIELD_NUMBER: _ClassVar[int]
    OPTIONS_FIELD_NUMBER: _ClassVar[int]
    PROVENANCE_FIELD_NUMBER: _ClassVar[int]
    LATEST_FIT_FIRST_PERIOD_FIELD_NUMBER: _ClassVar[int]
    LATEST_FIT_LAST_PERIOD_FIELD_NUMBER: _ClassVar[int]
    TRIAL_NAMES_FIELD_NUMBER: _ClassVar[int]
    VERDICT_FIELD_NUMBER: _ClassVar[int]
    periods: _containers.RepeatedScalarFieldContainer[str]
    refits: int
    strategies: _containers.RepeatedCompositeFieldContainer[StrategyPerformance]
    sweep: _containers.RepeatedCompositeFieldContainer[SweepPoint]
    comparisons: _containers.RepeatedCompositeFieldContainer[SharpeComparison]
    probabilistic_sharpe: float
    deflated_sharpe: float
    trials: int
    alphas: _containers.RepeatedCompositeFieldContainer[AlphaTest]
    pricing: PricingTest
    newey_west_lag: int
    latest_fit: ComputeWeightsResponse
    options: BacktestOptions
    provenance: Provenance
    latest_fit_first_period: str
    latest_fit_last_period: str
    trial_names: _containers.RepeatedScalarFieldContainer[str]
    verdict: _containers.RepeatedScalarFieldContainer[str]
    def __init__(self, periods: _Optional[_Iterable[str]] = ..., refits: _Optional[int] = ..., strategies: _Optional[_Iterable[_Union[StrategyPerformance, _Mapping]]] = ..., sweep: _Optional[_Iterable[_Union[SweepPoint, _Mapping]]] = ..., comparisons: _Optional[_Iterable[_Union[SharpeComparison, _Mapping]]] = ..., probabilistic_sharpe: _Optional[float] = ..., deflated_sharpe: _Optional[float] = ..., trials: _Optional[int] = ..., alphas: _Optional[_Iterable[_Union[AlphaTest, _Mapping]]] = ..., pricing: _Optional[_Union[PricingTest, _Mapping]] = ..., newey_west_lag: _Optional[int] = ..., latest_fit: _Optional[_Union[ComputeWeightsResponse, _Mapping]] = ..., options: _Optional[_Union[BacktestOptions, _Mapping]] = ..., provenance: _Optional[_Union[Provenance, _Mapping]] = ..., latest_fit_first_period: _Optional[str] = ..., latest_fit_last_period: _Optional[str] = ..., trial_names: _Optional[_Iterable[str]] = ..., verdict: _Optional[_Iterable[str]] = ...) -> None: ...

class RunBacktestResponse(_message.Message):
    __slots__ = ("progress", "result", "request_id")
    PROGRESS_FIELD_NUMBER: _ClassVar[int]
    RESULT_FIELD_NUMBER: _ClassVar[int]
    REQUEST_ID_FIELD_NUMBER: _ClassVar[int]
    progress: BacktestProgress
    result: BacktestResult
    request_id: str
    def __init__(self, progress: _Optional[_Union[BacktestProgress, _Mapping]] = ..., result: _Optional[_Union[BacktestResult, _Mapping]] = ..., request_id: _Optional[str] = ...) -> None: ...
