"""Check report.html pages in a real browser: nothing cut, nothing lost in print.

For each page, at window widths of 1280 and 800 px, in headless Chromium (driven by
Playwright, the system's chromium as its executable):
- every text of every chart lies inside its SVG's view box (the text's box from the
  browser's own layout, getBBox, in the chart's units; 0.5 unit of slack);
- no table is wider than the block that holds it (a wide table must wrap, shrink or sit
  in a scrolling block that shows all of it on screen; the check is that its box fits);
Then the page is printed to PDF (A4, as a reader would print it) and the PDF's text, read
back with PyMuPDF, must hold every column header of every table: a column cut off at the
page edge loses its header.

Run: python browser_check.py CHROMIUM REPORT.html [REPORT.html ...]
Exit status 1 and a list of what failed when anything does.
`python browser_check.py CHROMIUM --self-test` first shows that each check can fail: on a
page made to break all three rules it must find all three kinds of problem.
"""
import re
import sys
import tempfile

import pymupdf
from playwright.sync_api import sync_playwright

FIND_PROBLEMS = """
() => {
  const out = [];
  for (const svg of document.querySelectorAll('svg[viewBox]')) {
    const vb = svg.viewBox.baseVal;
    if (!vb || vb.width === 0) continue;
    const name = svg.getAttribute('aria-label') || '(unlabelled chart)';
    for (const t of svg.querySelectorAll('text')) {
      const b = t.getBBox();
      if (b.width === 0 && b.height === 0) continue;
      // getBBox is in the text's own units: map its corners through its transform.
      const m = t.transform.baseVal.consolidate();
      const corners = [[b.x, b.y], [b.x + b.width, b.y], [b.x, b.y + b.height], [b.x + b.width, b.y + b.height]]
        .map(([x, y]) => m ? [m.matrix.a * x + m.matrix.c * y + m.matrix.e, m.matrix.b * x + m.matrix.d * y + m.matrix.f] : [x, y]);
      const xs = corners.map(c => c[0]), ys = corners.map(c => c[1]);
      const slack = 0.5;
      if (Math.min(...xs) < vb.x - slack || Math.max(...xs) > vb.x + vb.width + slack ||
          Math.min(...ys) < vb.y - slack || Math.max(...ys) > vb.y + vb.height + slack) {
        out.push(`chart '${name}': text '${t.textContent}' runs past the view box ` +
          `(${Math.min(...xs).toFixed(1)}..${Math.max(...xs).toFixed(1)} × ${Math.min(...ys).toFixed(1)}..${Math.max(...ys).toFixed(1)} ` +
          `against ${vb.width} × ${vb.height})`);
      }
    }
  }
  for (const table of document.querySelectorAll('table')) {
    const holder = table.parentElement;
    const width = table.getBoundingClientRect().width;
    const room = holder.clientWidth;
    if (width > room + 1) {
      const head = [...table.querySelectorAll('th')].slice(0, 3).map(h => h.textContent).join(' | ');
      out.push(`table '${head}…' is ${width.toFixed(0)} px wide in a block of ${room} px`);
    }
  }
  return out;
}
"""

HEADERS = """
() => [...document.querySelectorAll('thead th')].map(th => th.textContent)
"""


def squeeze(text):
    """Text without any white space or soft hyphen, for matching across line breaks."""
    return re.sub(r"[\s\u00ad]+", "", text)


def check(browser, report):
    problems = []
    for width in (1280, 800):
        page = browser.new_page(viewport={"width": width, "height": 900})
        page.goto(f"file://{report}")
        problems += [f"{width} px: {p}" for p in page.evaluate(FIND_PROBLEMS)]
        page.close()
    page = browser.new_page()
    page.goto(f"file://{report}")
    headers = sorted(set(h for h in page.evaluate(HEADERS) if h.strip()))
    with tempfile.NamedTemporaryFile(suffix=".pdf") as pdf:
        page.pdf(path=pdf.name, prefer_css_page_size=True, print_background=True)
        doc = pymupdf.open(pdf.name)
        pages = doc.page_count
        text = squeeze(" ".join(p.get_text() for p in doc))
    page.close()
    lost = [h for h in headers if squeeze(h) not in text]
    problems += [f"print: column header '{h}' is not in the PDF" for h in lost]
    print(f"{report}: {len(headers)} distinct column headers, {pages} PDF pages, "
          f"{len(problems)} problems")
    return problems


BROKEN = """<!DOCTYPE html><html><head><meta charset="utf-8"><style>
body{max-width:600px}.clip{overflow:hidden;width:300px}.clip table{white-space:nowrap}
@media print{.clip{width:200px}}</style></head><body>
<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 100 40" width="100" aria-label="too long">
<text x="10" y="20">a label far too long for this chart</text></svg>
<div><table><thead><tr><th>a</th></tr></thead><tbody><tr><td style="white-space:nowrap">
""" + "wide " * 200 + """</td></tr></tbody></table></div>
<div class="clip"><table><thead><tr><th>first</th>""" + "".join(
    f"<th>column{i}</th>" for i in range(40)) + """<th>lastheader</th></tr></thead></table></div>
</body></html>"""


def self_test(browser):
    """The checks find a chart label past its view box, a table wider than its block, and a
    header lost in print, on a page made with all three."""
    with tempfile.NamedTemporaryFile("w", suffix=".html", delete=False) as page:
        page.write(BROKEN)
    problems = check(browser, page.name)
    kinds = {
        "chart text": any("runs past the view box" in p for p in problems),
        "wide table": any("px wide in a block of" in p for p in problems),
        "lost header": any("'lastheader' is not in the PDF" in p for p in problems),
    }
    print(f"self-test: {kinds}")
    if not all(kinds.values()):
        sys.exit(f"the checks missed a planted problem: {kinds}; found {problems}")


def main():
    chromium, reports = sys.argv[1], sys.argv[2:]
    problems = []
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=chromium, args=["--no-sandbox", "--disable-gpu"])
        if reports[:1] == ["--self-test"]:
            self_test(browser)
            reports = reports[1:]
        for report in reports:
            problems += [f"{report}: {x}" for x in check(browser, report)]
        browser.close()
    for x in problems:
        print(x)
    if problems:
        sys.exit(f"{len(problems)} problems in the reports")


if __name__ == "__main__":
    main()
