"""The HTML report: parses, holds every section, figures have titles and alt text, numbers match."""
import re
import shutil
import subprocess
from html.parser import HTMLParser

import pandas as pd
import pytest

from hybrid import HybridFactorModel
from hybrid.app.report import build_report
from hybrid.datasets.club import tasting_club
from hybrid.planning.planner import plan


class Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.h2, self.svgs, self.titles, self.stack, self.text = [], [], [], [], [], []
        self.external = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        self.stack.append(tag)
        if tag == "svg":
            self.svgs.append(a)
        if tag in ("script", "link", "img") and any(k in a for k in ("src", "href")):
            self.external.append(a)

    def handle_endtag(self, tag):
        if self.stack and self.stack[-1] == tag:
            self.stack.pop()

    def handle_data(self, data):
        if self.stack and self.stack[-1] == "h2":
            self.h2.append(data.strip())
        if self.stack and self.stack[-1] == "title" and "svg" in self.stack:
            self.titles.append(data.strip())
        self.text.append(data)


@pytest.fixture(scope="module")
def page():
    club = tasting_club(n_members=1500, n_lots=300, n_new=20, seed=4)
    m = HybridFactorModel(rank=4, epochs=12, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    m.add_items(club.new_lots)
    p = plan(m, budget=100, draws=32)
    return build_report(m, p.items, draws=32), p


def test_report_sections_figures_and_numbers(page):
    text, p = page
    c = Collect()
    c.feed(text)
    assert c.h2 == ["Coverage", "Ratings needed", "Map of items", "Training", "New items", "Cautions"]
    assert len(c.svgs) == 5 and all(s.get("role") == "img" and len(s.get("aria-label", "")) > 40 for s in c.svgs)
    assert len(c.titles) == 5 and all(c.titles)
    assert not c.external and not re.search(r'(href|src)="(https?:)?//', text)   # nothing fetched
    counts = p.items["status"].value_counts()
    table = re.search(r'<table[^>]*status-counts.*?</table>', text, re.S).group(0)
    for status, n in counts.items():
        assert re.search(rf"<td>{status}</td>\s*<td>{n}</td>", table), status
    assert f"{int((p.items['ratings'] == 0).sum())} items have no ratings yet" in text
    assert "consent" in text or "agreed to be asked" in text
    assert "estimate" in text


def test_report_stays_small_for_5000_items():
    club = tasting_club(n_members=3000, n_lots=5000, n_new=50, seed=2, mean_ratings_per_member=20)
    m = HybridFactorModel(rank=4, epochs=5, schema=club.schema, text_min_df=1, prior="fixed").fit(
        club.ratings, club.lots)
    p = plan(m, draws=16)
    text = build_report(m, p.items, draws=16)
    assert len(text.encode()) < 2_000_000


def test_report_renders_in_a_real_browser(page, tmp_path):
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("Debian's chromium is not installed here (.ci/run installs it where it can)")
    html_path = tmp_path / "report.html"
    html_path.write_text(page[0])
    shot = tmp_path / "shot.png"
    subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                    "--disable-component-update", "--disable-sync", "--no-first-run",
                    f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=1200,2400",
                    html_path.as_uri()], check=True, capture_output=True, timeout=120)
    import matplotlib.image as mpimg
    pixels = mpimg.imread(shot)
    assert pixels.shape[0] > 100 and pixels[..., :3].std() > 0.05   # not a blank page


def test_status_by_a_column_typo_refused_numbers_binned():
    from hybrid.app.report import _groups
    from hybrid.common.errors import InputError

    club = tasting_club(n_members=300, n_lots=60, n_new=0, seed=5)
    m = HybridFactorModel(rank=3, epochs=4, schema=club.schema).fit(club.ratings, club.lots)
    items = plan(m, k=5, draws=16).items
    with pytest.raises(InputError, match=r"no attribute column 'regoin' \(did you mean 'region'\?\)"):
        build_report(m, items, k=5, draws=16, by="regoin")
    # a number is cut at its quintiles (pandas.qcut): five bins in numeric order, each holding
    # about a fifth of the items, and every item counted once
    bins = _groups(club.lots["price"])
    assert list(bins.cat.categories[:5]) == sorted(bins.cat.categories[:5], key=lambda c: float(c.split()[0]))
    counts = bins.value_counts()
    assert counts.sum() == 60 and counts.drop("(none)").between(10, 14).all()
    page = build_report(m, items, k=5, draws=16, by="price")
    assert page.count("status-by") == 1 and " to " in page.split("Status by price")[1][:2000]


def _new_items_table(text: str) -> pd.DataFrame:
    """The new-items table of a page, read with regular expressions (no HTML parser package)."""
    block = re.search(r'<table[^>]*new-items.*?</table>', text, re.S).group(0)
    heads = re.findall(r"<th(?:\s[^>]*)?>(.*?)</th>", block, re.S)
    rows = [re.findall(r"<td[^>]*>(.*?)</td>", r, re.S) for r in re.findall(r"<tr[^>]*>(.*?)</tr>", block, re.S)]
    table = pd.DataFrame([r for r in rows if r], columns=heads)
    return table.assign(**{"expected rating": table["expected rating"].astype(float)})


def test_new_items_show_name_interval_reasons_and_audience(page):
    text, p = page
    table = _new_items_table(text)
    assert list(table.columns) == ["item", "name", "expected rating", "80% interval", "main reasons",
                                   "users likely to like it", "neighbours (distance)"]
    assert len(table) == int((p.items["ratings"] == 0).sum())
    ends = table["80% interval"].str.split(" to ", expand=True).astype(float)
    assert ((ends[0] <= table["expected rating"] + 5e-3) & (table["expected rating"] <= ends[1] + 5e-3)).all()
    assert table["main reasons"].str.contains(r" [+-]\d\.\d\d").all()
    assert table["name"].notna().all()


def test_a_click_on_a_heading_sorts_the_table_in_a_real_browser(page, tmp_path):
    # headless Chromium runs the page's own script; a script added after it clicks the heading of
    # "expected rating" and the page's DOM is read back
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("Debian's chromium is not installed here (.ci/run installs it where it can)")
    click = ('<script>var h = document.querySelectorAll("table.new-items thead th")[2]; h.click(); h.click();'
             '</script></body>')
    html_path = tmp_path / "clicked.html"
    html_path.write_text(page[0].replace("</body>", click))
    dom = subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                          "--disable-component-update", "--disable-sync", "--no-first-run",
                          f"--user-data-dir={tmp_path / 'profile'}", "--dump-dom", html_path.as_uri()],
                         check=True, capture_output=True, text=True, timeout=120).stdout
    table = _new_items_table(dom)
    shown = table["expected rating"].tolist()
    assert shown == sorted(shown, reverse=True) and shown != sorted(shown)   # two clicks: highest first
    assert 'aria-sort="descending"' in dom


@pytest.fixture(scope="module")
def campaign_page(tmp_path_factory):
    """A report with a two-wave campaign (invented answers, some members never answer)."""
    import numpy as np

    from hybrid.planning.waves import Campaign

    club = tasting_club(n_members=800, n_lots=120, n_new=0, seed=6)
    with pytest.warns(Warning):
        m = HybridFactorModel(rank=4, epochs=10, schema=club.schema, text_min_df=1).fit(club.ratings, club.lots)
    c = Campaign.start(tmp_path_factory.mktemp("camp") / "c.ledger", m, budget=400,
                       plan_settings={"k": 5, "draws": 16, "aim": "gain"})
    rng = np.random.default_rng(2)
    for wave in (1, 2):
        _, p = c.plan_wave(m, budget=120)
        got = p.asks[rng.random(len(p.asks)) < 0.4]
        m, _ = c.import_answers(m, pd.DataFrame({"user": got["user"], "item": got["item"], "rating": 4.0}), f"w{wave}")
    progress = c.progress()
    return build_report(m, plan(m, draws=16, k=5).items, draws=16, k=5, progress=progress), progress


def _campaign_table(text):
    """The campaign table of a page, read as the new-items table is."""
    block = re.search(r'<table[^>]*campaign.*?</table>', text, re.S).group(0)
    heads = re.findall(r"<th(?:\s[^>]*)?>(.*?)</th>", block, re.S)
    rows = [re.findall(r"<td[^>]*>(.*?)</td>", r, re.S) for r in re.findall(r"<tr[^>]*>(.*?)</tr>", block, re.S)]
    table = pd.DataFrame([r for r in rows if r], columns=heads)
    numeric = ["wave", "asked", "answered", "kept seen"]
    return table.assign(**{c: pd.to_numeric(table[c]) for c in numeric})


def test_the_campaign_section_shows_each_wave(campaign_page):
    text, progress = campaign_page
    parsed = Collect()
    parsed.feed(text)
    assert "Campaign" in parsed.h2 and "Campaign waves" in parsed.titles
    table = _campaign_table(text)
    assert table["wave"].tolist() == [1, 2]
    assert table["asked"].tolist() == progress["asked"].tolist()
    assert table["answered"].tolist() == progress["answered"].tolist()
    assert (table["kept seen"].between(0, 1)).all() and not parsed.external


def _dom(browser, page, script, tmp_path):
    html_path = tmp_path / "page.html"
    html_path.write_text(page.replace("</body>", f"<script>{script}</script></body>"))
    return subprocess.run([browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                           "--disable-component-update", "--disable-sync", "--no-first-run",
                           f"--user-data-dir={tmp_path / 'profile'}", "--dump-dom", html_path.as_uri()],
                          check=True, capture_output=True, text=True, timeout=120).stdout


def test_the_campaign_table_sorts_and_filters_in_a_real_browser(campaign_page, tmp_path):
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("Debian's chromium is not installed here (.ci/run installs it where it can)")
    text, _ = campaign_page
    # a click on "wave" twice: the last wave first
    dom = _dom(browser, text, 'var h = document.querySelectorAll("table.campaign thead th")[0]; h.click(); h.click();',
               tmp_path)
    assert _campaign_table(dom)["wave"].tolist() == [2, 1]
    # typing "2" in the box above the table hides the rows without it (the page's own script)
    dom = _dom(browser, text, 'var t = document.querySelector("table.campaign"); var box = t.previousElementSibling;'
                              'box.value = "nothing-like-this"; box.dispatchEvent(new Event("input"));', tmp_path)
    rows = re.findall(r"<tr[^>]*>", dom.split('class="dataframe campaign')[1].split("</table>")[0])
    hidden = [r for r in rows if "display: none" in r]
    assert len(hidden) == 2 and 'type="search"' in dom
