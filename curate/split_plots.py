"""Pictures of groups and splits: group sizes, and each class's share per split.

Functions return a matplotlib Figure (Agg backend); saving it is the caller's job.
"""

from __future__ import annotations

import numpy as np


def _figure(width, height):
    import matplotlib

    matplotlib.use("Agg", force=False)
    from matplotlib.figure import Figure

    return Figure(figsize=(width, height), layout="constrained")


def plot_group_sizes(grouping):
    """Histogram of images per group (log scales): a lone giant group stands out.

    Examples
    --------
    >>> import pandas as pd
    >>> from curate.grouping import group_images
    >>> g = group_images(pd.DataFrame({"image_id": [1, 2, 3], "patient_id": ["a", "a", "b"]}))
    >>> fig = plot_group_sizes(g)
    >>> fig.axes[0].get_xlabel()
    'images per group'
    """
    sizes = grouping.groups.value_counts().to_numpy()
    fig = _figure(6, 3.5)
    ax = fig.add_subplot()
    edges = np.unique(np.logspace(0, np.log10(max(sizes.max(), 2)) + 0.01, 30).astype(int))
    ax.hist(sizes, bins=np.append(edges, edges[-1] + 1), color="#4477aa")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel("images per group")
    ax.set_ylabel("groups")
    ax.set_title(f"{len(grouping.groups)} images in {len(sizes)} groups; largest {sizes.max()}")
    return fig


def plot_split_shares(assignment, *, max_classes: int = 30):
    """Each class's share of images per split (stacked bars) against the target shares.

    Examples
    --------
    >>> import pandas as pd
    >>> from curate.splitting import propose_split
    >>> cat = pd.DataFrame({"image_id": range(8), "group_id": list("aabbccdd"), "label": list("xyxyxyxy")})
    >>> fig = plot_split_shares(propose_split(cat, fractions=[0.5, 0.5], stratify="label"))
    >>> len(fig.axes)
    1
    """
    table = assignment.class_table
    fig = _figure(7, 0.3 * min(max_classes, max(table["value"].nunique(), 1)) + 1.5)
    ax = fig.add_subplot()
    if table.empty:
        ax.set_title("no stratification columns")
        return fig
    wide = table.pivot_table(index=["column", "value"], columns="split", values="fraction", aggfunc="sum")
    wide = wide.reindex(columns=list(assignment.names)).fillna(0.0)
    totals = table.groupby(["column", "value"])["images"].sum().reindex(wide.index)
    wide = wide.loc[totals.sort_values(ascending=False).index[:max_classes]]
    labels = [f"{c}={v}" for c, v in wide.index]
    left = np.zeros(len(wide))
    for name in assignment.names:
        ax.barh(labels, wide[name].to_numpy(), left=left, label=name)
        left += wide[name].to_numpy()
    for edge in np.cumsum(assignment.fractions)[:-1]:
        ax.axvline(edge, color="black", linestyle="--", linewidth=0.8)
    ax.invert_yaxis()
    ax.set_xlim(0, 1)
    ax.set_xlabel("share of the class's images (dashed: targets)")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize="small")
    ax.set_title(f"class shares per split (largest {len(wide)} classes)")
    return fig
