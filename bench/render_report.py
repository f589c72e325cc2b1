"""Render a report in headless Chromium as its readers will, and print what a reviewer would check.

    python bench/render_report.py results/demo/report/report.html [--out DIR]

Installs nothing. Without a Chromium (``chromium``, ``chromium-browser`` or ``google-chrome`` on PATH) or
poppler's ``pdfinfo``/``pdftotext``/``pdftoppm`` it prints the reason and exits 0, so it can run anywhere.

It prints, and writes to DIR (default: a temporary folder):

* at 1280 px wide (screen): whether anything scrolls sideways, and the elements wider than the window;
* at the printable width of A4 and of Letter (print style applied): elements wider than the page, and the
  smallest figure text in points after the browser has scaled each figure to fit (issue target: at least 9 pt);
* the report printed to PDF on A4 and on Letter: page count, whether the summary panel (its heading and its
  closing caution) is all on page 1; page images ``a4-<n>.png`` for looking at.
"""

from __future__ import annotations

import argparse
import json
import re
import shutil
import subprocess
import sys
import tempfile
from html import unescape
from pathlib import Path

BROWSERS = ("chromium", "chromium-browser", "google-chrome")
CSS_PX_PER_MM = 96 / 25.4
PAGES = {"A4": 210.0, "Letter": 215.9}  # page widths in mm
SIDE_MARGINS_MM = 24.0  # the print style's @page margin: 14 mm 12 mm

# Measures the page and writes the result as JSON into the DOM, which --dump-dom then prints.
MEASURE = r"""
<script>
window.addEventListener("load", () => {
  const width = document.documentElement.clientWidth;
  const wide = [];
  for (const el of document.body.querySelectorAll("*")) {
    const r = el.getBoundingClientRect();
    if (r.width > 0 && r.right > width + 0.5) {
      if (el.parentElement && el.parentElement.getBoundingClientRect().right > width + 0.5) continue;  // outermost
      const text = (el.textContent || "").trim().replace(/\s+/g, " ").slice(0, 60);
      wide.push(el.tagName.toLowerCase() + (el.id ? "#" + el.id : "") + " " + Math.round(r.right) + "px: " + text);
    }
  }
  const figures = [];
  for (const svg of document.querySelectorAll("svg")) {
    const box = svg.viewBox.baseVal;
    if (!box || !box.width) continue;
    const scale = svg.getBoundingClientRect().width / box.width;  // CSS px per user unit (1 user unit = 1 pt)
    let smallest = Infinity;
    for (const t of svg.querySelectorAll("text")) {
      const size = parseFloat(getComputedStyle(t).fontSize);  // in user units
      if (size > 0) smallest = Math.min(smallest, size * scale * 0.75);  // CSS px -> pt
    }
    figures.push({label: (svg.getAttribute("aria-label") || "").slice(0, 60), smallest_pt: smallest});
  }
  const out = document.createElement("pre");
  out.id = "rw-measure";
  out.textContent = JSON.stringify({
    client_width: width, scroll_width: document.documentElement.scrollWidth, wide: wide.slice(0, 20),
    n_wide: wide.length, figures: figures});
  document.body.appendChild(out);
});
</script>
"""


def browser() -> str | None:
    return next((shutil.which(b) for b in BROWSERS if shutil.which(b)), None)


def chromium(exe: str, *args: str) -> subprocess.CompletedProcess:
    base = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars", "--virtual-time-budget=10000"]
    return subprocess.run([*base, *args], capture_output=True, text=True, check=False, timeout=300)


def measured(exe: str, html: str, folder: Path, name: str, width_px: int) -> dict:
    page = folder / f"{name}.html"
    page.write_text(html.replace("</body>", MEASURE + "</body>"), encoding="utf-8")
    dom = chromium(exe, f"--window-size={width_px},1200", "--dump-dom", page.as_uri()).stdout
    found = re.search(r'<pre id="rw-measure">(.*?)</pre>', dom, re.S)
    if not found:
        raise SystemExit(f"the browser returned no measurement for {name}")
    return json.loads(unescape(found.group(1)))


def as_print(html: str, paper: str) -> str:
    """The report with its print style applied on screen and the paper size set."""
    html = html.replace("@media print {", "@media all {", 1)
    return html.replace("@page {", f"@page {{ size: {paper}; ", 1)


def report_line(name: str, m: dict) -> str:
    smallest = min((f["smallest_pt"] for f in m["figures"]), default=float("nan"))
    sideways = m["scroll_width"] > m["client_width"]
    return (
        f"{name}: window {m['client_width']} px, page {m['scroll_width']} px, "
        f"scrolls sideways: {'yes' if sideways else 'no'}; "
        f"elements wider than the window: {m['n_wide']}; figures: {len(m['figures'])}, smallest figure text "
        f"{smallest:.1f} pt"
    )


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("report", type=Path)
    parser.add_argument("--out", type=Path, default=None, help="folder for the PDFs and page images")
    args = parser.parse_args(argv)
    exe = browser()
    missing = [tool for tool in ("pdfinfo", "pdftotext", "pdftoppm") if not shutil.which(tool)]
    if exe is None or missing:
        print(f"skipped: no {'Chromium' if exe is None else ', '.join(missing)} on PATH; nothing was rendered")
        return 0
    html = args.report.read_text(encoding="utf-8")
    folder = args.out or Path(tempfile.mkdtemp(prefix="render-"))
    folder.mkdir(parents=True, exist_ok=True)
    print(f"report {args.report} ({len(html):,} bytes); outputs in {folder}")
    screen = measured(exe, html, folder, "screen", 1280)
    print(report_line("screen 1280 px", screen))
    failures = ["sideways scroll at 1280 px"] if screen["scroll_width"] > screen["client_width"] else []
    for paper, width_mm in PAGES.items():
        width_px = int((width_mm - SIDE_MARGINS_MM) * CSS_PX_PER_MM)
        printed = measured(exe, as_print(html, paper), folder, f"print-{paper}", width_px)
        print(report_line(f"print {paper} ({width_px} px)", printed))
        for item in printed["wide"]:
            print(f"  wider than the page: {item}")
        small = [f for f in printed["figures"] if f["smallest_pt"] < 9.0 - 0.05]  # rounding of the scale
        for f in small:
            print(f"  figure text below 9 pt ({f['smallest_pt']:.1f} pt): {f['label']}")
        failures += [f"{paper}: {printed['n_wide']} elements wider than the page"] * bool(printed["n_wide"])
        failures += [f"{paper}: {len(small)} figures with text below 9 pt"] * bool(small)
        page = folder / f"print-{paper}.html"
        page.write_text(html.replace("@page {", f"@page {{ size: {paper}; ", 1), encoding="utf-8")
        pdf = folder / f"report-{paper}.pdf"
        chromium(exe, "--no-pdf-header-footer", f"--print-to-pdf={pdf}", page.as_uri())
        info = subprocess.run(["pdfinfo", str(pdf)], capture_output=True, text=True, check=True).stdout
        pages = int(re.search(r"Pages:\s+(\d+)", info).group(1))
        first = subprocess.run(
            ["pdftotext", "-f", "1", "-l", "1", "-layout", str(pdf), "-"], capture_output=True, text=True, check=True
        ).stdout
        flat = " ".join(first.split())
        on_first = "Summary" in flat and "Headline numbers" in flat and "licensed clinicians" in flat
        print(f"PDF {paper}: {pages} pages; summary panel entirely on page 1: {'yes' if on_first else 'NO'}")
        failures += [f"{paper}: summary panel not on page 1"] * (not on_first)
        if paper == "A4":
            subprocess.run(["pdftoppm", "-png", "-r", "60", str(pdf), str(folder / "a4")], check=True)
    print("all checks pass" if not failures else "FAILED: " + "; ".join(failures))
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
