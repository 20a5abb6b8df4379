"""Pages that fit: in headless Chromium, the digest, the model pages, a pass page and the index
fit a 1,300 px window, and the digest e-mail's HTML part a 900 px one, without sideways
scrolling: neither the document nor any scrolling box inside it (a table's wrapper) is wider than
what it shows.

The pages forbid scripts (their Content-Security-Policy); the test measures a copy of each with
that policy removed and a small script appended that writes the measurements into the DOM,
which ``--dump-dom`` returns. A control page with a table far wider than the window shows that
the measurement can fail.
"""

from __future__ import annotations

import re
from pathlib import Path

import pytest
from report_history import History, build_history
from test_browser import _chromium, _run

from monitor.notify import (
    build_digest,
    render_digest_html,
    render_pass_report,
    write_digest,
    write_model_pages,
)

PROBE = """<script>
(function () {
  var root = document.documentElement, out = ["document " + root.scrollWidth + " " +
      root.clientWidth];
  var all = document.querySelectorAll("body *");
  for (var i = 0; i < all.length; i++) {
    var e = all[i], style = getComputedStyle(e);
    var scrolls = style.overflowX === "auto" || style.overflowX === "scroll";
    if (scrolls && e.scrollWidth > e.clientWidth + 1) {
      var caption = e.querySelector("caption");
      out.push("scrolls " + e.scrollWidth + " " + e.clientWidth + " " +
               (caption ? caption.textContent.slice(0, 60) : e.className));
    }
  }
  var pre = document.createElement("pre");
  pre.id = "width-report";
  pre.textContent = out.join("\\n");
  document.body.appendChild(pre);
})();
</script>"""


def _overflow(page: Path, width: int, workdir: Path) -> list[str]:
    """What scrolls sideways when ``page`` is shown ``width`` px wide (empty: nothing)."""
    text = page.read_text(encoding="utf-8")
    text = re.sub(r'<meta http-equiv="Content-Security-Policy"[^>]*>', "", text)
    assert "</body>" in text
    probe = workdir / f"probe-{width}-{page.name}"
    probe.write_text(text.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    result = _run(_chromium(), workdir / f"profile-{page.stem}-{width}",
                  f"--window-size={width},900", "--virtual-time-budget=3000", "--dump-dom",
                  probe.as_uri())
    assert result.returncode == 0, result.stderr[-2000:]
    match = re.search(r'<pre id="width-report">(.*?)</pre>', result.stdout, re.S)
    assert match, "the probe did not run"
    lines = match.group(1).splitlines()
    document_width, shown = (int(v) for v in lines[0].split()[1:3])
    assert shown == width, f"the window is {shown} px wide, not {width}"
    problems = [] if document_width <= shown else [f"the page is {document_width} px wide"]
    return problems + lines[1:]


@pytest.fixture(scope="module")
def history(tmp_path_factory: pytest.TempPathFactory) -> History:
    return build_history(tmp_path_factory.mktemp("widths"))


def test_the_measurement_can_fail(tmp_path: Path) -> None:
    page = tmp_path / "wide.html"
    cells = "".join(f"<td>column_{i}_with_a_long_heading</td>" for i in range(40))
    page.write_text("<!doctype html><html><body><div style='overflow-x:auto'><table><caption>"
                    f"planted</caption><tr>{cells}</tr></table></div></body></html>", "utf-8")
    problems = _overflow(page, 900, tmp_path)
    assert problems and "planted" in problems[0]


def test_pages_fit_1300_px(history: History, tmp_path: Path) -> None:
    with history.open() as store:
        digest = write_digest(store, history.config, record=False)
        write_model_pages(store, history.config)
        render_pass_report(store, history.config, history.pass_ids[-1], write_models=False)
    folder = digest.parent
    pages = [digest, folder / "index.html", folder / f"pass-{history.pass_ids[-1]}.html",
             *sorted(folder.glob("model-*.html"))]
    assert len(pages) >= 5
    for page in pages:
        assert _overflow(page, 1300, tmp_path) == [], page.name


def test_the_digest_email_fits_900_px(history: History, tmp_path: Path) -> None:
    with history.open() as store:
        digest = build_digest(store, history.config)
    html, _ = render_digest_html(digest, email=True)
    page = tmp_path / "digest-email.html"
    page.write_text(html, encoding="utf-8")
    assert _overflow(page, 900, tmp_path) == []
