"""dsp's public surface: ``import dsp; dsp.Analyzer, dsp.find_peaks, …`` (as scipy.signal
exposes its functions), what ``import dsp`` loads, and the examples in dsp's docstrings.

Knows the dsp package's modules and their ``__all__``; nothing of the service."""

from __future__ import annotations

import ast
import doctest
import importlib
import inspect
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

import dsp

DSP = Path(dsp.__file__).resolve().parent
# every module of dsp except the benchmark tool and the internal sample buffer
PUBLIC_MODULES = ("analyzer", "averaging", "bands", "chainplan", "decimate", "envelope",
                  "filterbank", "grid", "kinematics", "kurtogram", "orders", "scaling", "spec",
                  "tacho", "tones", "types", "windows")


def test_the_modules_listed_are_all_of_dsp():
    on_disk = {p.stem for p in DSP.glob("*.py")} - {"__init__", "bench", "buffer"}
    assert on_disk == set(PUBLIC_MODULES)


def test_all_is_the_union_of_the_modules_all():
    union = set()
    for name in PUBLIC_MODULES:
        module_all = importlib.import_module(f"dsp.{name}").__all__
        assert not union & set(module_all), f"dsp.{name} repeats a public name"
        union |= set(module_all)
    assert sorted(dsp.__all__) == sorted(union)
    assert len(dsp.__all__) == len(set(dsp.__all__))


@pytest.mark.parametrize("name", dsp.__all__)
def test_each_public_name_is_the_submodules_object(name):
    module = importlib.import_module(f"dsp.{dsp._PUBLIC[name]}")
    assert name in module.__all__
    assert getattr(dsp, name) is getattr(module, name)
    assert name in dir(dsp)


def test_type_checkers_see_the_same_names():
    # the `if TYPE_CHECKING:` imports are what mypy and editors resolve `dsp.X` to
    tree = ast.parse((DSP / "__init__.py").read_text("utf-8"))
    block = next(n for n in tree.body if isinstance(n, ast.If)
                 and isinstance(n.test, ast.Name) and n.test.id == "TYPE_CHECKING")
    seen = {(imp.module, a.name) for imp in block.body if isinstance(imp, ast.ImportFrom)
            for a in imp.names}
    assert seen == {(module, name) for name, module in dsp._PUBLIC.items()}


def test_an_unknown_name_is_an_attribute_error():
    with pytest.raises(AttributeError, match="module 'dsp' has no attribute 'welch'"):
        dsp.welch  # noqa: B018
    assert not hasattr(dsp, "SampleBuffer")  # internal: dsp.buffer.SampleBuffer


# what the service brings and dsp must never load (scipy itself may load what it likes)
SERVICE_SIDE = {"service", "pydantic", "fastapi", "starlette", "uvicorn", "websockets",
                "prometheus_client", "threadpoolctl", "web", "tests"}


def _loaded_after(code: str) -> dict[str, bool | list[str]]:
    """Run ``code`` in a fresh interpreter; which top-level packages it loaded (beyond what
    the interpreter had loaded before it, e.g. by site-packages' .pth files)."""
    probe = (
        "import sys\nbefore = set(sys.modules)\n" + code + "\n"
        "import json\n"
        "tops = {m.split('.')[0] for m in set(sys.modules) - before}\n"
        "print(json.dumps({'numpy': 'numpy' in tops, 'scipy': 'scipy' in tops,\n"
        "    'dsp_modules': sorted(m for m in sys.modules if m.startswith('dsp.')),\n"
        f"    'service_side': sorted(tops & set({sorted(SERVICE_SIDE)!r}))}}))"
    )
    out = subprocess.run([sys.executable, "-c", probe], cwd=DSP.parent, capture_output=True,
                         text=True, timeout=120, check=True)
    return json.loads(out.stdout)


def test_importing_dsp_loads_nothing_until_a_name_is_used():
    # the service's light modules import dsp.types; that must not pull in scipy
    bare = _loaded_after("import dsp")
    assert bare == {"numpy": False, "scipy": False, "dsp_modules": [], "service_side": []}
    types_only = _loaded_after("import dsp.types")
    assert types_only == {"numpy": False, "scipy": False, "dsp_modules": ["dsp.types"],
                          "service_side": []}


def test_the_whole_surface_needs_only_numpy_and_scipy():
    used = _loaded_after("import dsp\nfor n in dsp.__all__: getattr(dsp, n)")
    assert used["numpy"] and used["scipy"]
    assert used["service_side"] == []
    # every public module, and of the rest only the buffer they share (never the benchmark)
    assert set(used["dsp_modules"]) == {f"dsp.{m}" for m in PUBLIC_MODULES} | {"dsp.buffer"}


def test_dsp_source_imports_only_numpy_scipy_and_the_standard_library():
    # the library; dsp/bench.py is the benchmark tool (it pins BLAS threads with threadpoolctl)
    allowed = {"numpy", "scipy", "dsp", "__future__"} | set(sys.stdlib_module_names)
    for path in sorted(set(DSP.glob("*.py")) - {DSP / "bench.py"}):
        for node in ast.walk(ast.parse(path.read_text("utf-8"))):
            if isinstance(node, ast.Import):
                tops = [a.name.split(".")[0] for a in node.names]
            elif isinstance(node, ast.ImportFrom) and node.level == 0 and node.module:
                tops = [node.module.split(".")[0]]
            else:
                continue
            assert set(tops) <= allowed, f"{path.name} imports {tops}"


@pytest.mark.parametrize("name", ("__init__", *PUBLIC_MODULES))
def test_docstring_examples_hold(name):
    module = dsp if name == "__init__" else importlib.import_module(f"dsp.{name}")
    finder = doctest.DocTestFinder(exclude_empty=True)
    runner = doctest.DocTestRunner(optionflags=doctest.NORMALIZE_WHITESPACE)
    tests = finder.find(module, module.__name__)
    for t in tests:
        runner.run(t)
    result = runner.summarize(verbose=False)
    assert result.failed == 0
    if name in ("__init__", "bands", "decimate", "filterbank", "kinematics", "windows"):
        assert result.attempted > 0  # these modules carry examples; they must keep them


# --- numpydoc sections ----------------------------------------------------------------------
#
# Every public function and class documents its parameters numpydoc-style (a ``Parameters``
# section naming each one, units stated beside it), and every function that returns a value
# has a ``Returns`` section. Result records (frozen dataclasses the functions return) name
# their fields under ``Attributes`` instead.

SECTION = re.compile(r"^(\w[\w ]*)\n-{3,}\s*$", re.M)


def numpydoc_sections(doc: str) -> dict[str, list[str]]:
    """Section title → the names it lists (lines ``name : type`` or ``a, b : type``)."""
    doc = inspect.cleandoc(doc)
    marks = list(SECTION.finditer(doc))
    out: dict[str, list[str]] = {}
    for i, m in enumerate(marks):
        body = doc[m.end(): marks[i + 1].start() if i + 1 < len(marks) else len(doc)]
        names = []
        for line in body.splitlines():
            item = re.match(r"^([\w*][\w*, ]*?)\s*:\s", line) or re.match(r"^([\w*]+)\s*$", line)
            if item and not line.startswith(" "):
                names += [n.strip().lstrip("*") for n in item.group(1).split(",")]
        out[m.group(1)] = names
    return out


def _documented(obj: object) -> tuple[str, list[str], list[str]]:
    """(what is missing, parameters of the signature, the names the docstring lists)."""
    doc = inspect.getdoc(obj) or ""
    sections = numpydoc_sections(doc)
    params = [p for p in inspect.signature(obj).parameters if p not in ("self", "cls")]
    listed = sections.get("Parameters", []) or sections.get("Attributes", [])
    problems = [f"{p} not in Parameters/Attributes" for p in params if p not in listed]
    problems += [f"{p} listed but not a parameter" for p in listed if p not in params]
    if inspect.isfunction(obj):
        returns = inspect.signature(obj).return_annotation
        if returns not in ("None", None, inspect.Signature.empty) and "Returns" not in sections:
            problems.append("no Returns section")
    return "; ".join(problems), params, listed


PUBLIC_CALLABLES = [n for n in dsp.__all__
                    if inspect.isfunction(getattr(dsp, n)) or inspect.isclass(getattr(dsp, n))]


@pytest.mark.parametrize("name", PUBLIC_CALLABLES)
def test_public_functions_and_classes_have_numpydoc_sections(name):
    problems, _, _ = _documented(getattr(dsp, name))
    assert problems == ""


# the methods a library user calls to stream samples through and read results out
MAIN_METHODS = [
    *(("Analyzer", m) for m in ("push", "reset", "set_speed", "quantity", "power", "spectrum",
                                "psd", "bands", "tones", "peaks")),
    ("FilterBank", "push"), ("FilterBank", "push_power"),
    ("Decimator", "push"), ("MultiRate", "push"),
]


@pytest.mark.parametrize(("cls", "method"), MAIN_METHODS)
def test_main_methods_have_numpydoc_sections(cls, method):
    problems, params, _ = _documented(getattr(getattr(dsp, cls), method))
    assert problems == ""


def test_a_missing_parameter_or_returns_is_reported():
    def f(x: float, fs: float) -> float:
        """Thing.

        Parameters
        ----------
        x : float
            Samples.
        gone : int
            Not a parameter any more.
        """
        return x

    problems, params, listed = _documented(f)
    assert params == ["x", "fs"] and listed == ["x", "gone"]
    assert problems == ("fs not in Parameters/Attributes; gone listed but not a parameter; "
                        "no Returns section")


def test_the_section_reader_reads_numpydoc():
    doc = '''Do a thing.

    Parameters
    ----------
    x : ndarray
        Samples, g.
    fs, hop : float
        Sample rate, Hz; hop, samples.
    **kwargs : dict
        More.

    Returns
    -------
    ndarray
        The thing, mm/s.
    '''
    assert numpydoc_sections(doc) == {"Parameters": ["x", "fs", "hop", "kwargs"],
                                      "Returns": ["ndarray"]}
