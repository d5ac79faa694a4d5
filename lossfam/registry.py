"""The registry: a plain mapping from family name to the class that builds it."""
from __future__ import annotations

import dataclasses

from .families import BUILT_IN, BUILT_IN_SEVERAL, Family, SeveralScoreFamily

_REGISTRY: dict[str, type] = {cls.name: cls for cls in BUILT_IN + BUILT_IN_SEVERAL}
_KINDS = {"one": Family, "several": SeveralScoreFamily}


def available(scores: str | None = None) -> list[str]:
    """Sorted names of the registered families.

    ``scores="one"`` lists only the families with one raw score per row (:class:`lossfam.Family`),
    ``scores="several"`` only those with several (:class:`lossfam.SeveralScoreFamily`); None lists all.
    """
    if scores is None:
        return sorted(_REGISTRY)
    if scores not in _KINDS:
        raise ValueError(f"scores must be None, 'one' or 'several', got {scores!r}")
    return sorted(n for n, cls in _REGISTRY.items() if issubclass(cls, _KINDS[scores]))


def register(cls: type, *, replace: bool = False) -> type:
    """Register a user family class under ``cls.name``; usable as a decorator.

    The class must subclass :class:`lossfam.Family` or :class:`lossfam.SeveralScoreFamily` (a
    frozen dataclass whose fields are its parameters).  Registering a name that exists
    raises ValueError unless ``replace=True``.
    """
    if not (isinstance(cls, type) and issubclass(cls, (Family, SeveralScoreFamily))):
        raise TypeError(f"register expects a subclass of lossfam.Family or lossfam.SeveralScoreFamily, got {cls!r}")
    if not dataclasses.is_dataclass(cls):
        raise TypeError(f"{cls.__name__} must be decorated with @dataclasses.dataclass(frozen=True)")
    name = getattr(cls, "name", None)
    if not isinstance(name, str) or not name or name in (Family.name, SeveralScoreFamily.name):
        raise ValueError(f"{cls.__name__} needs a class attribute `name` (a non-empty string)")
    if name in _REGISTRY and _REGISTRY[name] is not cls and not replace:
        raise ValueError(f"a family named {name!r} is already registered; pass replace=True to override it")
    _REGISTRY[name] = cls
    return cls


def unregister(name: str) -> None:
    """Remove a registered family (built-in names included)."""
    if name not in _REGISTRY:
        raise ValueError(f"no family named {name!r}; registered: {available()}")
    del _REGISTRY[name]


def family(name, **params) -> Family:
    """Build the family ``name`` with nuisance parameters ``params``.

    ``name`` may also be a family object, returned as is (with ``params``
    applied when given).  Unknown names and parameters raise ValueError that
    lists the valid choices; out-of-range values raise ValueError with the range.
    """
    if isinstance(name, (Family, SeveralScoreFamily)):
        return name.with_params(**params) if params else name
    if not isinstance(name, str) or name not in _REGISTRY:
        raise ValueError(f"unknown family {name!r}; choose one of: {', '.join(available())}")
    cls = _REGISTRY[name]
    valid = [f.name for f in dataclasses.fields(cls)]
    unknown = sorted(set(params) - set(valid))
    if unknown:
        raise ValueError(
            f"{name}: unknown parameter(s) {unknown}; valid parameters: {', '.join(valid) or 'none'}"
        )
    return cls(**params)
