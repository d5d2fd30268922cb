"""Settings as the README names them (a dict) to the API's ``Settings`` message."""

from __future__ import annotations

import difflib
import math
from typing import Mapping, Optional

import grpc

from ._proto import weights_pb2 as pb
from .errors import CLIENT_DOMAIN, KeelsonError

# Enum settings: the proto enum's value prefix.
_ENUMS = {
    "method": "METHOD_",
    "scaling": "SCALING_",
    "cv_criterion": "CV_CRITERION_",
    "normalization": "NORMALIZATION_",
    "missing_policy": "MISSING_POLICY_",
    "aggregate": "AGGREGATE_",
    "risk_calibration": "RISK_CALIBRATION_",
}
# A number, or "auto" (chosen by cross-validation, one year for holding_periods, read
# from the period labels for periods_per_year).
_AUTO = ("components", "kappa", "holding_periods", "periods_per_year")
# A bound, or "off".
_CAPS = ("max_weight", "max_gross", "max_market_weight", "max_turnover")
# Everything else is a plain field of the message.
_PLAIN = tuple(
    f.name
    for f in pb.Settings.DESCRIPTOR.fields
    if f.name not in _ENUMS
    and not any(f.name == k or f.name == f"{k}_auto" or f.name == f"{k}_off" for k in _AUTO + _CAPS)
)

#: Every setting name ``settings=`` accepts (the README's Settings table).
SETTING_NAMES = tuple(sorted(set(_ENUMS) | set(_AUTO) | set(_CAPS) | set(_PLAIN)))


def _refuse(key: str, message: str) -> KeelsonError:
    return KeelsonError.of(grpc.StatusCode.INVALID_ARGUMENT, message, reason="INVALID_SETTING",
                           domain=CLIENT_DOMAIN, metadata={"field": f"settings.{key}"})


def settings_message(settings: Optional[Mapping[str, object]]) -> pb.Settings:
    """The ``Settings`` message of a dict such as ``{"method": "components", "kappa": "auto",
    "max_weight": 0.2}``; unset keys take the server's defaults. Unknown keys and values
    of the wrong kind raise :class:`KeelsonError` before anything is sent."""
    msg = pb.Settings()
    for raw_key, value in (settings or {}).items():
        key = str(raw_key).strip().replace("-", "_")
        if key in _ENUMS:
            name = _ENUMS[key] + str(value).strip().upper().replace("-", "_")
            enum = msg.DESCRIPTOR.fields_by_name[key].enum_type
            assert enum is not None, key
            if name not in enum.values_by_name or name.endswith("_UNSPECIFIED"):
                allowed = sorted(v.name[len(_ENUMS[key]):].lower().replace("_", "-")
                                 for v in enum.values if not v.name.endswith("_UNSPECIFIED"))
                raise _refuse(key, f"setting {key}: {value!r} is not one of {', '.join(allowed)}")
            setattr(msg, key, enum.values_by_name[name].number)
        elif key in _AUTO:
            if isinstance(value, str) and value.strip().lower() == "auto":
                setattr(msg, f"{key}_auto", True)
            else:
                setattr(msg, key, _number(key, value, integer=key in ("components", "periods_per_year")))
        elif key in _CAPS:
            if value is None or (isinstance(value, str) and value.strip().lower() == "off"):
                setattr(msg, f"{key}_off", True)
            else:
                setattr(msg, key, _number(key, value))
        elif key in _PLAIN:
            field = msg.DESCRIPTOR.fields_by_name[key]
            if field.type == field.TYPE_BOOL:
                if not isinstance(value, bool):
                    raise _refuse(key, f"setting {key}: expected true or false, got {value!r}")
                setattr(msg, key, value)
            else:
                integer = field.type in (field.TYPE_UINT32, field.TYPE_UINT64)
                setattr(msg, key, _number(key, value, integer=integer))
        else:
            close = difflib.get_close_matches(key, SETTING_NAMES, n=1)
            hint = f" (did you mean {close[0]}?)" if close else ""
            raise _refuse(key, f"unknown setting {raw_key!r}{hint}; the settings are: {', '.join(SETTING_NAMES)}")
    return msg


def _number(key: str, value: object, integer: bool = False) -> float:
    if isinstance(value, bool):
        raise _refuse(key, f"setting {key}: expected a number, got {value!r}")
    try:
        x = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise _refuse(key, f"setting {key}: expected a number, got {value!r}") from None
    if not math.isfinite(x):
        raise _refuse(key, f"setting {key}: {value!r} is not finite")
    if integer:
        if x != int(x) or x < 0:
            raise _refuse(key, f"setting {key}: expected a whole number, got {value!r}")
        return int(x)
    return x
