"""``verifier demo``: a small invented codebase with assistant commits, and the gate run on each.

The scenario: Quillfeather Logistics keeps ``parcelkit``, a library that prices parcels. Its engineers
work with an editor assistant, ``quill-assist``, whose commits carry the ``Model-Written`` trailer.
Three assistant commits follow a human one: one that is well tested, one whose new branch no test
executes, and one that breaks an existing test.
"""

from __future__ import annotations

import tempfile
from pathlib import Path

from verifier.demo.scratch import ScratchRepo

AGENT = "quill-assist/2.3"

RATES = '''"""Parcel pricing for Quillfeather Logistics."""

BASE_RATE = 4.50
PER_KG = 1.20


def price(weight_kg: float) -> float:
    """Price of a parcel by weight, in euros, rounded to the cent."""
    if weight_kg <= 0:
        raise ValueError("weight must be positive")
    return round(BASE_RATE + PER_KG * weight_kg, 2)
'''

TEST_RATES = """from parcelkit.rates import price
import pytest


def test_price_of_one_kilo():
    assert price(1) == 5.70


def test_rejects_empty_parcels():
    with pytest.raises(ValueError):
        price(0)
"""

VOLUME = '''"""Volumetric weight: bulky parcels are priced by size, not mass."""

DIVISOR = 5000


def volumetric_weight(length_cm: float, width_cm: float, height_cm: float) -> float:
    """The weight a parcel is charged for by its size, in kg."""
    return round(length_cm * width_cm * height_cm / DIVISOR, 2)
'''

TEST_VOLUME = """from parcelkit.volume import volumetric_weight


def test_volumetric_weight_of_a_shoebox():
    assert volumetric_weight(30, 20, 10) == 1.2
    assert volumetric_weight(33, 21, 11) == 1.52  # rounded to two digits
    assert volumetric_weight(100, 100, 100) == 200.0
"""

ZONES = '''"""Surcharges by delivery zone."""


def surcharge(zone: str) -> float:
    if zone == "city":
        return 0.0
    if zone == "island":
        extra = 7.5
        return extra + ferry_fee()
    return 2.0


def ferry_fee() -> float:
    return 3.25
'''

TEST_ZONES = """from parcelkit.zones import surcharge


def test_city_is_free():
    assert surcharge("city") == 0.0


def test_rural_costs_two():
    assert surcharge("rural") == 2.0
"""

ROUNDING = RATES.replace("round(BASE_RATE + PER_KG * weight_kg, 2)", "int(BASE_RATE + PER_KG * weight_kg)")


def machine_message(title: str) -> str:
    return f"{title}\n\nDrafted in the editor by the assistant.\n\nModel-Written: {AGENT}\n"


def build(path: Path) -> tuple[ScratchRepo, list[tuple[str, str]]]:
    """Create the demo repository; return it and the (commit, what it shows) pairs to check."""
    repo = ScratchRepo(path)
    repo.commit(
        "Start parcelkit: price by weight",
        {
            "parcelkit/__init__.py": "",
            "parcelkit/rates.py": RATES,
            "tests/test_rates.py": TEST_RATES,
            "README.md": "# parcelkit\n\nParcel pricing for Quillfeather Logistics.\n",
        },
    )
    tested = repo.commit(
        machine_message("Add volumetric weight"), {"parcelkit/volume.py": VOLUME, "tests/test_volume.py": TEST_VOLUME}
    )
    uncovered = repo.commit(
        machine_message("Add zone surcharges"), {"parcelkit/zones.py": ZONES, "tests/test_zones.py": TEST_ZONES}
    )
    broken = repo.commit(machine_message("Simplify price rounding"), {"parcelkit/rates.py": ROUNDING})
    return repo, [
        (tested, "a tested assistant commit: expect PASS"),
        (uncovered, "an assistant commit whose island branch no test runs: expect BLOCK (coverage)"),
        (broken, "an assistant commit that breaks an existing test: expect BLOCK (tests)"),
    ]


def run_demo(where: Path | None, sandbox: str = "auto") -> int:
    """Build the demo repository and run the gate on each assistant commit; 0 when all went as expected."""
    from verifier.change.stage import RevisionSpec
    from verifier.pipeline import Options, verify
    from verifier.report import render

    path = where or Path(tempfile.mkdtemp(prefix="verifier-demo-"))
    if path.exists() and any(path.iterdir()):
        from verifier.errors import UsageError

        raise UsageError(f"{path} is not empty", hint="give a new or empty folder for the demo repository")
    sandbox = _demo_sandbox(sandbox)
    repo, cases = build(path)
    print(f"demo repository: {repo.path} (Quillfeather Logistics' parcelkit, assistant {AGENT})\n")
    expected = ["pass", "block", "block"]
    verdicts = []
    for sha, what in cases:
        print(f"=== verifier check {sha[:12]}  ({what})")
        report = verify(repo.path, RevisionSpec(text=sha), Options(sandbox=sandbox, vouched_code=True))
        verdicts.append(report.verdict)
        print(render(report, "text"))
    print("=== verifier check HEAD~3..HEAD  (the three together, as a pull request)")
    whole = verify(repo.path, RevisionSpec(text="HEAD~3..HEAD"), Options(sandbox=sandbox, vouched_code=True))
    print(render(whole, "text"))
    ok = verdicts == expected
    print("demo: every verdict is as expected" if ok else f"demo: unexpected verdicts {verdicts}")
    return 0 if ok else 1


def _demo_sandbox(requested: str) -> str:
    """The demo runs only our own sample code, so it may fall back to the process sandbox (and says so)."""
    from verifier.sandbox import choose

    if requested != "auto":
        return requested
    backend = choose("auto", allow_process=True)
    if backend.name == "process":
        print(
            "note: no isolating sandbox works here ('verifier sandbox doctor' says why); the demo's own sample "
            "code runs in the process sandbox, which isolates nothing. 'verifier check' never falls back so.\n"
        )
    return backend.name
