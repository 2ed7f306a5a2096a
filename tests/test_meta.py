"""Meta-tests: public docstrings match signatures; the public API stays short.

common practice (scikit-learn style): a numpydoc ``Parameters`` section names exactly the
function's parameters.
"""

from __future__ import annotations

import importlib
import inspect
import pkgutil
import re

import pytest

import audit


def _public_functions():
    for info in pkgutil.walk_packages(audit.__path__, "audit."):
        if info.name == "audit.__main__":
            continue
        mod = importlib.import_module(info.name)
        for name in getattr(mod, "__all__", ()):
            obj = getattr(mod, name, None)
            if inspect.isfunction(obj) and obj.__module__ == mod.__name__:
                yield f"{mod.__name__}.{name}", obj


def _documented_params(doc: str) -> list[str] | None:
    m = re.search(r"\n\s*Parameters\n\s*-+\n(.*?)(\n\s*\n\s*[A-Z][a-z]+\n\s*-+\n|\Z)", doc, re.S)
    if not m:
        return None
    names = []
    for line in m.group(1).splitlines():
        mm = re.match(r"^([A-Za-z_][\w, ]*?)\s*:", line)  # names start at column 0
        if mm:
            names += [n.strip() for n in mm.group(1).split(",")]
    return names


FUNCS = sorted(_public_functions())


@pytest.mark.parametrize("name,fn", FUNCS, ids=[n for n, _ in FUNCS])
def test_docstring_parameters_match_signature(name, fn):
    doc = inspect.getdoc(fn) or ""
    documented = _documented_params("\n" + doc)
    if documented is None:
        return  # no Parameters section: nothing to check
    params = [p for p in inspect.signature(fn).parameters if p not in ("self", "args", "kwargs")]
    assert set(documented) == set(params), f"{name}: documented {documented}, signature {params}"


def test_public_api_is_short():
    assert set(audit.__all__) == {"check", "check_summary", "Findings", "AuditInputError", "__version__"}
