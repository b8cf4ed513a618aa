"""A class's rows of the cycle's tables, as the partitioned assets get them (the benchmarks' report step)."""

from __future__ import annotations

import numpy as np
import pandas as pd


def class_slices(frames: dict, shares: pd.DataFrame, classes):
    """Each class's rows of every frame with a `product` column (the products of its share-table rows; other frames
    whole), as the partitioned assets get them: yields (class, name -> frame), the rows in their order, one class
    at a time (a class's frames are dropped before the next class's are made, as when each class sliced its own).
    Each frame's products are hashed once (`pd.factorize`) and every class picked by its code, where a per-class
    `isin` hashed every row once per class (about 3 s of a 100k slice's elapsed time, outside its total)."""
    product_class = shares.drop_duplicates("product").set_index("product")["product_class"]
    row_classes = {}
    for name, frame in frames.items():
        if "product" in frame.columns:
            codes, products = pd.factorize(frame["product"])
            of_product = np.append(pd.Index(products).map(product_class).to_numpy(dtype=object), None)
            row_classes[name] = of_product[codes]  # code -1 (a missing product) takes the None at the end
    for c in classes:
        yield c, {n: f[row_classes[n] == c] if n in row_classes else f for n, f in frames.items()}
