"""The certificate: one :class:`CheckResult` row per check, the :class:`VerifyReport`, and its outputs."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

import torch

from ..fileio import atomic_write_json, json_safe
from ..folders import CERTIFICATE_FORMAT, check_file_target

__all__ = ["CheckResult", "VerifyReport", "versions", "render_verify", "write_report", "check_report_target"]

_CERTIFICATE = CERTIFICATE_FORMAT

_CERTIFICATE_VERSION = 1


@dataclass
class CheckResult:
    """One row of the certificate: the check's name, verdict, numbers and a sentence."""

    check: str
    passed: bool
    numbers: dict = field(default_factory=dict)
    detail: str = ""
    summary: str = ""
    warning: str = ""  # a passed check the user should still know about (shown as WARN)

    def to_json(self) -> dict:
        out = {"check": self.check, "passed": bool(self.passed), "numbers": json_safe(self.numbers),
               "detail": self.detail, "summary": self.summary}
        if self.warning:
            out["warning"] = self.warning
        return out

@dataclass
class VerifyReport:
    """Every check of one verification plus what is needed to reproduce it."""

    checks: list[CheckResult]
    meta: dict = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        return bool(self.checks) and all(c.passed for c in self.checks)

    @property
    def failed(self) -> list[str]:
        return [c.check for c in self.checks if not c.passed]

    def __getitem__(self, name: str) -> CheckResult:
        for c in self.checks:
            if c.check == name:
                return c
        raise KeyError(f"no check named {name!r} in this report; it has {', '.join(c.check for c in self.checks)}")

    def __contains__(self, name: object) -> bool:
        return any(c.check == name for c in self.checks)

    def to_json(self) -> dict:
        return {"format": _CERTIFICATE, "schema_version": _CERTIFICATE_VERSION, "passed": self.passed,
                **json_safe(self.meta), "checks": [c.to_json() for c in self.checks]}


def versions() -> dict[str, str | None]:
    """Versions of splice and the libraries a certificate depends on (``None`` if not installed)."""
    import platform

    from ..version import library_versions

    return {**library_versions("torchvision", "onnx", "onnxruntime", "numpy", "safetensors"),
            "python": platform.python_version(), "torch": torch.__version__}


def render_verify(report: VerifyReport, console) -> None:
    """Print the certificate as a rich table (check, numbers, PASS/FAIL), then the failures' details."""
    from rich.table import Table

    where = report.meta.get("folder") or "model"
    table = Table(title=f"splice verify {where} (seed {report.meta.get('seed')}, {report.meta.get('dtype')}, "
                        f"batch {report.meta.get('batch')})")
    table.add_column("check")
    table.add_column("numbers")
    table.add_column("result", justify="center")
    for row in report.checks:
        result = ("[bold red]FAIL[/]" if not row.passed else
                  "[bold yellow]WARN[/]" if row.warning else "[bold green]PASS[/]")
        table.add_row(row.check, row.summary or row.detail, result)
    console.print(table)
    for row in report.checks:
        if not row.passed:
            console.print(f"[bold red]{row.check}[/]: {row.detail}", markup=True, highlight=False)
        elif row.warning:
            console.print(f"[bold yellow]{row.check}[/]: {row.detail}", markup=True, highlight=False)
    if report.meta.get("not_run"):
        console.print(f"not run: {report.meta['not_run']}")
    n = len(report.checks)
    if report.passed:
        warned = [row.check for row in report.checks if row.warning]
        note = f" ({len(warned)} with a warning: {', '.join(warned)})" if warned else ""
        console.print(f"[bold green]PASS[/]: all {n} checks passed{note}", markup=True)
    else:
        console.print(f"[bold red]FAIL[/]: {len(report.failed)} of {n} checks failed ({', '.join(report.failed)})",
                      markup=True)

def check_report_target(path: str | os.PathLike) -> None:
    """Raise unless the certificate may be written at ``path``: new, or an earlier certificate (JSON whose
    ``format`` is the certificate's), never a folder or another file (:func:`splice.folders.check_file_target`)."""
    check_file_target(path, "--report target", "certificate.json", fmt=(_CERTIFICATE, "a certificate splice wrote"))


def write_report(report: VerifyReport, path: str | os.PathLike) -> Path:
    """Write the JSON certificate to ``path`` atomically (:func:`check_report_target` first)."""
    check_report_target(path)
    return atomic_write_json(path, report.to_json())
