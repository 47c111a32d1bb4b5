"""How close do declustered statistics come to the exhaustive truth?

    python experiments/declustering_accuracy.py

Synthetic fields (several seeds, two geometries, three drilling strengths); for each, the
mean porosity and sand fraction from the raw wells, cell declustering and nearest-node
weights, against the map truth.  Prints a table and the mean error ratio (declustered error
over naive error; 0 is perfect, 1 is no better than the raw wells).
"""

import numpy as np
import pandas as pd

from predictor.declustering import cell_declustering, nearest_node_weights
from predictor.stats import weighted_mean, weighted_proportions
from predictor.synthetic import FieldSpec, make_field


def one(spec: FieldSpec) -> dict:
    _, truth, wells = make_field(spec)
    xx, yy = np.meshgrid(truth.x, truth.y)
    cell = cell_declustering(wells.x, wells.y, wells.porosity)
    nearest = nearest_node_weights(wells.x, wells.y, xx, yy)
    true_phi = float(truth.porosity.mean())
    true_sand = float((truth.facies == 2).mean())
    row = {
        "seed": spec.seed,
        "geometry": spec.geometry,
        "strength": spec.drilling_strength,
        "phi_true": true_phi,
        "phi_naive": wells.porosity.mean(),
    }
    row["phi_cell"] = weighted_mean(wells.porosity, cell.weights)
    row["phi_nearest"] = weighted_mean(wells.porosity, nearest)
    row["sand_true"] = true_sand
    row["sand_naive"] = float(np.mean(wells.facies == "sand"))
    row["sand_cell"] = weighted_proportions(wells.facies, cell.weights).get("sand", 0.0)
    row["sand_nearest"] = weighted_proportions(wells.facies, nearest).get("sand", 0.0)
    for what in ("phi", "sand"):
        naive_err = abs(row[f"{what}_naive"] - row[f"{what}_true"])
        for method in ("cell", "nearest"):
            row[f"{what}_{method}_ratio"] = (
                abs(row[f"{what}_{method}"] - row[f"{what}_true"]) / naive_err
            )
    return row


def main() -> None:
    rows = [
        one(FieldSpec(seed=seed, geometry=geometry, drilling_strength=strength))
        for seed in range(1, 6)
        for geometry in ("channels", "lobes")
        for strength in (1.0, 1.5, 2.5)
    ]
    table = pd.DataFrame(rows)
    pd.set_option("display.width", 200)
    print(table.round(3).to_string(index=False))
    print("\nmean error ratio (declustered / naive), 0 = perfect, 1 = no better than raw wells:")
    print(
        table.groupby(["geometry", "strength"])[
            ["phi_cell_ratio", "phi_nearest_ratio", "sand_cell_ratio", "sand_nearest_ratio"]
        ]
        .mean()
        .round(2)
    )
    print(
        "\nall fields:",
        table[["phi_cell_ratio", "phi_nearest_ratio", "sand_cell_ratio", "sand_nearest_ratio"]]
        .mean()
        .round(2)
        .to_dict(),
    )
    print(
        "declustered closer than naive in",
        int((table.phi_cell_ratio < 1).sum()),
        "of",
        len(table),
        "fields (cell)",
    )


if __name__ == "__main__":
    main()
