"""``emulant pdf``: a clear message without Chromium, nothing half-written, folded parts opened.

The rendering itself is checked end to end on the demo report in ``tests/test_workflow.py``
(skipped only when Chromium is missing).
"""

from __future__ import annotations

from emulant import cli
from emulant.report.pdf import find_chromium, opened


def test_without_chromium_the_command_says_what_to_do(tmp_path, monkeypatch, capsys):
    page = tmp_path / "report.html"
    page.write_text("<html><body><h1>x</h1></body></html>", encoding="utf-8")
    monkeypatch.setenv("PATH", str(tmp_path / "empty"))
    monkeypatch.delenv("EMULANT_CHROMIUM", raising=False)
    assert find_chromium() is None
    rc = cli.main(["pdf", str(page)])
    err = capsys.readouterr().err
    assert rc == 2 and "Traceback" not in err
    assert "needs headless Chromium, which was not found" in err
    assert not (tmp_path / "report.pdf").exists()


def test_missing_report_is_named(tmp_path, capsys):
    rc = cli.main(["pdf", str(tmp_path / "nowhere.html")])
    err = capsys.readouterr().err
    assert rc == 2 and "nowhere.html: no such report file" in err


def test_browser_that_fails_leaves_no_pdf(tmp_path, monkeypatch, capsys):
    fake = tmp_path / "fake-browser"
    fake.write_text("#!/bin/sh\necho 'cannot start' >&2\nexit 3\n", encoding="utf-8")
    fake.chmod(0o755)
    monkeypatch.setenv("EMULANT_CHROMIUM", str(fake))
    page = tmp_path / "report.html"
    page.write_text("<html></html>", encoding="utf-8")
    rc = cli.main(["pdf", str(page), "--out", str(tmp_path / "out.pdf")])
    err = capsys.readouterr().err
    assert rc == 2 and "exit 3" in err and "cannot start" in err
    assert not list(tmp_path.glob("out.pdf*"))


def test_folded_parts_are_opened_for_printing():
    html = '<details class="fold"><summary>s</summary>x</details><details>y</details>'
    assert opened(html) == ('<details class="fold" open><summary>s</summary>x</details>'
                            "<details>y</details>")
