"""What polkit's settings objects share: built from an object, a dict or nothing, and checked.

:class:`polkit.data.LoadOptions` and :class:`polkit.inference.SamplerSettings` are frozen
dataclasses a caller may pass as the object itself, as a dict of its fields or as ``None``
(the defaults); a change with a name the object does not have is refused, naming the known
ones.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from typing import Any

from polkit.errors import ConfigError


def settings_base(cls, given: Any, changes: Mapping[str, Any], *, public_name: str, key: str,
                  noun: str, hint: str = ""):
    """``given`` as an instance of the dataclass ``cls``, after checking the names of ``changes``.

    ``given`` is an instance (returned as it is), a dict of field values (passed through
    ``cls.of``) or ``None`` (the defaults).  Anything else, and any name in ``changes`` that
    is not a field of ``cls``, is refused with a :class:`~polkit.errors.ConfigError` whose
    ``key`` is ``key``; ``hint`` follows the list of known names.
    """
    if given is None:
        base = cls()
    elif isinstance(given, cls):
        base = given
    elif isinstance(given, Mapping):
        base = cls.of(None, **dict(given))
    else:
        raise ConfigError(f"expected {public_name} or a dict; found {type(given).__name__}",
                          key=key)
    known = {f.name for f in dataclasses.fields(cls)}
    unknown = sorted(set(changes) - known)
    if unknown:
        raise ConfigError(f"unknown {noun}(s) {', '.join(unknown)}; known: "
                          f"{', '.join(sorted(known))}{hint}", key=key)
    return base
