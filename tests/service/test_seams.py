"""The typed seams between the service and its API (service.context, service.api.deps) and
the direction of imports downstream of the pipeline (DEVELOPERS.md "Data flow")."""

import ast
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from service.api import create_app
from service.hub import Hub

ROOT = Path(__file__).resolve().parents[2]


def _client() -> TestClient:
    # an app over a bare hub (no running service); an allowed Host (loopback)
    return TestClient(create_app(Hub()), base_url="http://127.0.0.1")


@pytest.mark.parametrize("path", ["/api/v1/alarms", "/api/v1/events", "/api/v1/events/1",
                                  "/api/v1/events/1/evidence"])
def test_routes_that_need_the_service_say_so_without_one(path: str) -> None:
    r = _client().get(path)
    assert r.status_code == 503
    assert "runs no monitoring service" in r.json()["detail"]


def test_health_and_metrics_answer_without_a_service() -> None:
    c = _client()
    h = c.get("/api/v1/health").json()
    assert h["status"] == "ok" and h["store"] is None and h["sources"] == {}
    m = c.get("/metrics").text
    assert "quaver_frames_published_total 0.0" in m and "quaver_store_ok" not in m


def _imports(path: Path) -> set[str]:
    """Modules ``path`` imports, resolved to dotted names inside the repository."""
    pkg = ".".join(path.relative_to(ROOT).with_suffix("").parts[:-1])
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.ImportFrom):
            base = pkg.split(".")[: len(pkg.split(".")) - (node.level - 1)] if node.level else []
            mod = ".".join([*base, *(node.module.split(".") if node.module else [])])
            out.add(mod)
            out.update(f"{mod}.{a.name}" for a in node.names)
        elif isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
    return out


# the pipeline and what assembles and runs the service around it
BACK = ("service.pipeline", "service.app", "service.runner", "service.supervise",
        "service.reload", "service.demo")


def test_nothing_downstream_of_the_pipeline_imports_it() -> None:
    downstream = [ROOT / "service" / "hub.py", ROOT / "service" / "context.py",
                  *sorted((ROOT / "service" / "api").glob("*.py"))]
    back = {p.name: sorted(m for m in _imports(p) if m in BACK)
            for p in downstream}
    assert {k: v for k, v in back.items() if v} == {}
