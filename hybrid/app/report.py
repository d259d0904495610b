"""One self-contained HTML report for the campaign meeting: plots as inline SVG, no network.

Every figure is a ``<figure>`` holding matplotlib's SVG with a title and a text
alternative (``role="img"`` and ``aria-label``) and a caption; shapes as well
as colours tell the groups apart.
"""
from __future__ import annotations

import html
import io

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.figure import Figure

from hybrid.app.nouns import GENERIC, speak_html
from hybrid.app.workflows import STATUS_WORDS
from hybrid.common.errors import InputError, did_you_mean
from hybrid.core.neighbours import nearest
from hybrid.estimator.batch import name_like
from hybrid.estimator.explain import intervals, reasons
from hybrid.planning.assess import STATUS, Assessor

CAUTIONS = ("Ratings are personal data, and a sampling campaign contacts people: ask only customers "
            "who agreed to be asked, honour opt-outs, and follow the data-protection law that applies "
            "to you. Every number in this report is an estimate from a statistical model, not a fact "
            "about any customer or product.")
STYLE = """body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;max-width:60rem;margin:2rem auto;
padding:0 1rem;color:#1b1b1b;line-height:1.5;font-size:1.05rem}h1,h2{line-height:1.2}table{border-collapse:collapse;
margin:1rem 0}td,th{border:1px solid #bbb;padding:.3rem .6rem;text-align:left}th{background:#eee}
figure{margin:1.5rem 0}figcaption{font-size:.95rem;color:#333}.caution{border-left:.4rem solid #8a5a00;
padding:.5rem 1rem;background:#fff6e5}svg{max-width:100%;height:auto}"""
MARKERS = {"trusted": ("o", "#1f5fa8"), "under-covered": ("^", "#b3541e"), "no ratings yet": ("s", "#2e7d32")}


def _subplots(figsize):
    """A figure of its own (``matplotlib.figure.Figure``): the report never touches pyplot's
    global state or backend, so a program that imports it keeps its own."""
    fig = Figure(figsize=figsize)
    return fig, fig.subplots()


def _svg(fig, title: str, alt: str) -> str:
    buf = io.StringIO()
    # no date and fixed element ids: the same inputs give the same report, byte for byte
    with matplotlib.rc_context({"svg.hashsalt": "hybrid-report"}):
        fig.savefig(buf, format="svg", bbox_inches="tight", metadata={"Date": None})
    text = buf.getvalue()
    text = text[text.index("<svg"):]
    label = html.escape(alt, quote=True)
    text = text.replace("<svg", f'<svg role="img" aria-label="{label}"', 1)
    head = text.index(">") + 1
    return text[:head] + f"<title>{html.escape(title)}</title>" + text[head:]


def _figure(fig, title, alt, caption):
    return (f'<figure data-title="{html.escape(title, quote=True)}">{_svg(fig, title, alt)}'
            f"<figcaption>{html.escape(caption)}</figcaption></figure>")


# tables with the class "sortable" sort by a click on a heading (numbers as numbers, again to
# reverse); plain JavaScript in the page, nothing fetched
SORTING = """document.querySelectorAll("table.sortable").forEach(function (t) {
  t.querySelectorAll("thead th").forEach(function (th, col) {
    th.style.cursor = "pointer"; th.title = "Click to sort";
    th.addEventListener("click", function () {
      var body = t.tBodies[0], rows = Array.prototype.slice.call(body.rows);
      var down = th.getAttribute("aria-sort") === "ascending";
      t.querySelectorAll("thead th").forEach(function (h) { h.removeAttribute("aria-sort"); });
      th.setAttribute("aria-sort", down ? "descending" : "ascending");
      function key(r) { var v = r.cells[col].textContent.trim(), n = parseFloat(v);
                        return isNaN(n) || !/^-?[0-9.]/.test(v) ? v.toLowerCase() : n; }
      rows.sort(function (a, b) { var x = key(a), y = key(b), c = x < y ? -1 : x > y ? 1 : 0;
                                  return down ? -c : c; });
      rows.forEach(function (r) { body.appendChild(r); });
    });
  });
});"""


# tables with the class "filterable" get a search box above them: rows that do not contain what is
# typed (any case) are hidden; plain JavaScript in the page, nothing fetched
FILTERING = """document.querySelectorAll("table.filterable").forEach(function (t) {
  var box = document.createElement("input");
  box.type = "search"; box.placeholder = "Filter rows"; box.setAttribute("aria-label", "Filter the table's rows");
  box.className = "filter";
  t.parentNode.insertBefore(box, t);
  box.addEventListener("input", function () {
    var q = box.value.trim().toLowerCase();
    Array.prototype.forEach.call(t.tBodies[0].rows, function (r) {
      r.style.display = !q || r.textContent.toLowerCase().indexOf(q) >= 0 ? "" : "none";
    });
  });
});"""


def _table(df: pd.DataFrame, cls="") -> str:
    """Every table of the report sorts by a click on a heading and filters as the reader types."""
    return df.to_html(index=False, border=0, classes=f"{cls} sortable filterable".strip(),
                      float_format=lambda v: f"{v:.3f}", escape=True)


def _groups(column: pd.Series, bins: int = 5) -> pd.Series:
    """A column to group by: as it is for categories, in quantile bins for numbers (one row per
    distinct price would say nothing); an item without a value is counted as "(none)"."""
    numbers = pd.to_numeric(column, errors="coerce")
    if column.notna().any() and numbers.notna().sum() == column.notna().sum() and numbers.nunique() > bins:
        codes, edges = pd.qcut(numbers, bins, labels=False, retbins=True, duplicates="drop")
        labels = [f"{lo:.4g} to {hi:.4g}" for lo, hi in zip(edges[:-1], edges[1:])] + ["(none)"]
        codes = np.where(numbers.notna(), codes, len(labels) - 1).astype(int)
        return pd.Series(pd.Categorical.from_codes(codes, labels), index=column.index)
    return column.astype(object).where(column.notna(), "(none)").astype(str)


def check_by(model, by) -> None:
    """Refuse a ``by`` column the model's attribute table does not have, naming the nearest."""
    table = getattr(model, "item_table_", None)
    if by is None or table is None or by in table.columns:
        return
    hint = did_you_mean(by, table.columns) or f"; the columns are {', '.join(map(str, table.columns))}"
    raise InputError(f"by: no attribute column '{by}'{hint}")


PLAN_COLUMNS = ("plan_target", "plan_k", "plan_budget", "model_fingerprint")


def plan_made_with(model, items: pd.DataFrame) -> dict:
    """What a plan's item table says it was made with: target, k, budget, model fingerprint.

    Refuses a plan made from another model (or from this one before an ``update``), whose
    numbers would contradict the model's; a plan without these columns (made by an older
    release) gives ``{}``.
    """
    if not set(PLAN_COLUMNS) <= set(items.columns) or not len(items):
        return {}
    made = {name: items[name].iloc[0] for name in PLAN_COLUMNS}
    if str(made["model_fingerprint"]) != model.fingerprint_:
        raise InputError(f"the plan was made from another model (fingerprint {made['model_fingerprint']}, "
                         f"this model's {model.fingerprint_}); run plan on this model")
    return {"target": float(made["plan_target"]), "k": int(made["plan_k"]),
            "budget": int(made["plan_budget"]), "fingerprint": str(made["model_fingerprint"])}


def coverage_section(model, items, by):
    counts = model.item_counts_
    fig, ax = _subplots(figsize=(7, 3.2))
    bins = np.unique(np.round(np.logspace(0, np.log10(max(counts.max(), 2)), 30)))
    ax.hist(counts[counts > 0], bins=bins, color="#1f5fa8", edgecolor="white")
    ax.set_xscale("log")
    ax.set(xlabel="ratings per item (log scale)", ylabel="items", title="Ratings per item")
    zero = int((counts == 0).sum())
    parts = ["<h2>Coverage</h2>", _figure(
        fig, "Ratings per item", f"Histogram of ratings per item on a log scale; {zero} items have none, "
        f"the most-rated has {int(counts.max())}.", f"{zero} items have no ratings yet.")]
    status = items["status"].value_counts().reindex(list(STATUS), fill_value=0)
    parts.append(_table(status.rename_axis("status").reset_index(name="items"), "status-counts"))
    parts.append(f'<p class="status-words">{html.escape(STATUS_WORDS)}</p>')
    table = getattr(model, "item_table_", None)
    if by is not None and table is not None:
        groups = _groups(table[by].reindex(items["item"]))
        grouped = pd.crosstab(groups.to_numpy(), items["status"].to_numpy())
        if isinstance(groups.dtype, pd.CategoricalDtype):   # bins in their numeric order
            grouped = grouped.reindex([c for c in groups.cat.categories if c in grouped.index])
        grouped = grouped.reindex(columns=list(STATUS), fill_value=0)
        grouped.columns.name = None
        grouped = grouped.rename_axis(by).reset_index()
        parts.append(f"<h3>Status by {html.escape(by)}</h3>" + _table(grouped, "status-by"))
    return "\n".join(parts)


def needed_section(model, items, k, target, draws, seed):
    need = items["needed"].dropna().astype(int)
    fig, ax = _subplots(figsize=(7, 3.2))
    ax.hist(need[need > 0], bins=30, color="#b3541e", edgecolor="white")
    ax.set(xlabel="more ratings needed to reach the target (ratings)", ylabel="items",
           title="Ratings needed")
    beyond = int(items["needed"].isna().sum())
    parts = ["<h2>Ratings needed</h2>", _figure(
        fig, "Ratings needed", f"Histogram of the ratings needed per item; {beyond} items need more "
        f"than the largest number considered.", f"{beyond} items need more than the largest number considered.")]
    worst = items[items["needed"].notna() & (items["needed"] > 0)].nlargest(10, "needed")
    if len(worst):
        A = Assessor(model, k=k, draws=draws, seed=seed)
        grid = np.array([0, 2, 5, 10, 20, 40, 80, 120, 200])
        idx = pd.Index(model.item_ids_).get_indexer(worst["item"])
        curves = np.column_stack([A.at(idx, n)[0] for n in grid])
        fig, ax = _subplots(figsize=(7, 3.6))
        for j, (item, curve) in enumerate(zip(worst["item"], curves)):
            ax.plot(grid, curve, marker="os^vD<>ph*"[j % 10], label=str(item))
        ax.axhline(target, color="black", linestyle="--", linewidth=1, label="target")
        ax.set(xlabel="more ratings (ratings)", ylabel="expected overlap (share of list)",
               title="Stability against extra ratings", ylim=(0, 1))
        ax.legend(fontsize=8, ncol=2)
        parts.append(_figure(fig, "Stability against extra ratings",
                             "Line chart of expected neighbour-list overlap against extra ratings for the ten "
                             "items that need the most; each line rises towards the dashed target line.",
                             "The ten items that need the most ratings."))
    return "\n".join(parts)


def map_section(model, items):
    from sklearn.decomposition import PCA

    off = 1 if model.biases else 0
    X = model.item_blocks_[:, off:]
    XY = PCA(n_components=2, random_state=0).fit_transform(X) if X.shape[1] >= 2 else np.column_stack(
        [X[:, 0], np.zeros(len(X))])
    status = items.set_index("item")["status"].reindex(model.item_ids_).to_numpy()
    fig, ax = _subplots(figsize=(7, 5))
    for name, (marker, colour) in MARKERS.items():
        sel = status == name
        ax.scatter(XY[sel, 0], XY[sel, 1], marker=marker, c=colour, s=14, alpha=0.75, label=f"{name} ({sel.sum()})",
                   rasterized=len(XY) > 1500)
    ax.set(xlabel="first principal component (vector units)", ylabel="second principal component (vector units)",
           title="Item vectors in two dimensions")
    ax.legend()
    return "<h2>Map of items</h2>" + _figure(
        fig, "Item vectors in two dimensions", "Scatter plot of item vectors projected on their two main "
        "directions; trusted items are circles, under-covered items triangles, items with no ratings squares.",
        "PCA of the item vectors (scikit-learn); shape and colour both mark the status.")


def training_section(model):
    h = pd.DataFrame(model.history_)
    fig, ax = _subplots(figsize=(7, 3.2))
    ax.plot(h["epoch"], h["objective"], marker="o", color="#1f5fa8", label="objective")
    ax.set(xlabel="epoch", ylabel="objective (squared rating units)", title="Training")
    if h["valid_rmse"].notna().any():
        ax2 = ax.twinx()
        ax2.plot(h["epoch"], h["valid_rmse"], marker="s", linestyle="--", color="#b3541e", label="validation RMSE")
        ax2.set_ylabel("validation RMSE (rating points)")
        ax2.legend(loc="upper center")
    ax.legend(loc="upper right")
    return "<h2>Training</h2>" + _figure(
        fig, "Training", "Line chart of the objective (falling) and, if measured, the validation RMSE per epoch.",
        f"{len(h)} epochs; final validation RMSE {model.metrics_.get('valid_rmse') or float('nan'):.4f}.")


def new_items_section(model, items, liked, k=3, interval=0.8):
    """The items without ratings: name, expected rating with its interval, the largest reasons,
    the users likely to like it (expected at ``liked`` or more) and its neighbours; a table the
    reader sorts by clicking a column's heading."""
    new = items[items["ratings"] == 0]["item"].to_numpy(str)
    if not len(new):
        return "<h2>New items</h2><p>No items without ratings.</p>"
    off = 1 if model.biases else 0
    rated = np.flatnonzero(model.item_counts_ > 0)
    z = model.blocks_for_items(new)
    idx, dist = nearest(z[:, off:], model.item_blocks_[rated, off:], k)
    blocks = [model.clip(b) for _, b in model.score_blocks(z, 512)]
    why, iv = reasons(model, new), intervals(model, new, level=interval, blocks=z)
    expected = np.concatenate([b.mean(1) for b in blocks])
    shift = expected - iv["centre"].to_numpy()   # the interval is the mean user's, carried over
    low, high = (np.clip(iv[end].to_numpy() + shift, *model.rating_range_) for end in ("low", "high"))
    table = pd.DataFrame({"item": new})
    names = name_like(model.item_table_.columns) if model.item_table_ is not None else []
    for col in names[:1]:
        table[col] = model.item_table_.loc[new, col].to_numpy()
    table = table.assign(**{
        "expected rating": expected, f"{interval:.0%} interval": [f"{a:.2f} to {b:.2f}" for a, b in zip(low, high)],
        "main reasons": ["; ".join(f"{n} {e:+.2f}" for n, e in why.top(j, 3)) for j in range(len(new))],
        "users likely to like it": np.concatenate([(b >= liked).sum(1) for b in blocks]),
        "neighbours (distance)": [", ".join(f"{model.item_ids_[rated[j]]} ({d:.2f})" for j, d in zip(r, dd))
                                   for r, dd in zip(idx, dist)]})
    return (f"<h2>New items</h2><p>Expected ratings are estimates, with their {interval:.0%} interval; the main "
            "reasons are the attributes that move the expected rating most (on the rating scale); the users likely to "
            f"like it are those whose expected rating is at least {liked:g}. Click a column's heading to sort; type in the "
            "box to filter rows.</p>"
            + _table(table, "new-items"))


def campaign_section(progress: pd.DataFrame) -> str:
    """A campaign wave by wave (:meth:`hybrid.planning.waves.Campaign.progress`): asks, expected and
    realised answers, and the share of lists predicted against seen to stand, in a plot and a table
    the reader sorts and filters."""
    if progress is None or not len(progress):
        return ""
    p = progress
    fig = Figure(figsize=(8, 3.2))
    ax, bx = fig.subplots(1, 2)
    w = p["wave"].to_numpy()
    ax.bar(w - 0.27, p["asked"], 0.27, color="#bbb", label="asked")
    ax.bar(w, p["expected_answers"], 0.27, color="#1f5fa8", label="answers expected")
    ax.bar(w + 0.27, p["ratings_folded_in"], 0.27, color="#b3541e", label="answers that came")
    ax.set(xlabel="wave", ylabel="count", title="Asks and answers", xticks=w)
    ax.legend(fontsize=8)
    done = p[p["answers_in"]]
    bx.plot(done["wave"], done["kept_predicted"], marker="o", color="#1f5fa8", label="share predicted to stand")
    bx.plot(done["wave"], done["kept_seen"], marker="s", linestyle="--", color="#b3541e", label="share seen to stand")
    bx.set(xlabel="wave", ylabel="share of neighbour lists", ylim=(0, 1.02), title="Lists after each wave", xticks=w)
    bx.legend(fontsize=8, loc="lower left")
    fig.tight_layout()
    shown = p.drop(columns=["answers_in"]).rename(columns=lambda c: c.replace("_", " "))
    return ("<h2>Campaign</h2><p>Each wave's asks, the answers the planner expected (asks times each user's "
            "estimated chance of answering) and those that came; the items it bought ratings for and those that "
            "reached the target; and, once its answers were folded in with update, the share of those items' "
            "neighbour lists the planner predicted would stand against the share that did. Predictions are "
            "estimates. Click a heading to sort; type in the box to filter rows.</p>"
            + _figure(fig, "Campaign waves", "Bar chart of asks, expected answers and answers per wave, and a line "
                      "chart of the share of lists predicted and seen to stand after each wave.",
                      f"{len(p)} wave(s); {int(p['ratings_folded_in'].sum())} answers folded in.")
            + _table(shown, "campaign"))


def build_report(model, items: pd.DataFrame, *, k=10, target=0.8, draws=64, seed=0, by=None, liked=4.0,
                 interval=0.8, title="Catalogue coverage and sampling plan", nouns=None, progress=None) -> str:
    """The whole HTML page for a model and a plan's item table (``Plan.items``).

    ``nouns`` (:func:`hybrid.app.nouns.nouns_of`) puts the catalogue's words in its headings and
    prose; ``progress`` (a campaign's, :meth:`hybrid.planning.waves.Campaign.progress`) adds its
    waves.  A plan's own target and k (its ``plan_*`` columns) win over ``target`` and ``k``, so the
    page's curves are drawn against what the plan was made for.
    """
    check_by(model, by)
    made = plan_made_with(model, items)
    target, k = made.get("target", target), made.get("k", k)
    stated = (f"Plan made for a stability target of {target:g} with neighbour lists of {k}"
              + (f", a budget of {made['budget']} ratings" if made.get("budget") else "")
              + f"; model fingerprint {model.fingerprint_}.")
    table = getattr(model, "item_table_", None)
    if by is None and table is not None:
        cats = [c for c, s in model.features_.spec().items() if s["type"] == "category"]
        by = cats[0] if cats else None
    body = [f"<h1>{html.escape(title)}</h1>",
            f'<p class="caution" role="note"><strong>Cautions.</strong> {html.escape(CAUTIONS)}</p>',
            f'<p class="plan-settings">{html.escape(stated)}</p>',
            coverage_section(model, items, by), needed_section(model, items, k, target, draws, seed),
            map_section(model, items), training_section(model),
            new_items_section(model, items, liked, interval=interval), campaign_section(progress),
            f'<h2>Cautions</h2><p class="caution">{html.escape(CAUTIONS)}</p>']
    return speak_html("<!DOCTYPE html><html lang=\"en\"><head><meta charset=\"utf-8\">"
                      f"<title>{html.escape(title)}</title><style>{STYLE}</style></head><body>"
                      + "\n".join(body) + f"<script>{SORTING}\n{FILTERING}</script></body></html>", nouns or GENERIC)
