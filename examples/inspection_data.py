"""Synthetic camera images of an invented inspection station, and its existing classifier.

Everything here is made up for the demo: the station, its parts, its defects and its
classifier. A camera looks down on a round machined part (a bright disc on a darker
belt, 3x32x32 RGB). The station already runs a certified defect classifier, exported to
ONNX and executed by onnxruntime, for three classes: ``ok``, ``scratch`` (a thin bright
line across the part) and ``dent`` (a dark spot on it). Now a new defect type must be
caught as well: an oil ``stain`` (a brownish blob). The demo adopts the classifier
unchanged and grows the stain check beside it.

    python examples/inspection_data.py --out DIR [--seed S]

writes ``station_classifier.onnx`` (the "existing" classifier, trained here in a few
seconds so that the demo is self-contained), ``taps.txt`` (the graph values the new
column reads), ``defects_probe.npz`` (a labelled probe for the certified task),
``oil_stain.npz`` and ``oil_stain_probe.npz`` (the new task).
"""

from __future__ import annotations

import argparse
import io
import os
import warnings

import numpy as np
import torch
import torch.nn as nn

SIZE = 32
DEFECTS = ["ok", "scratch", "dent"]
STAIN = ["clean", "stain"]


def _part(rng: np.random.Generator) -> np.ndarray:
    """A bright disc with a little texture on a darker belt, [3, SIZE, SIZE] in [0, 1]."""
    yy, xx = np.mgrid[0:SIZE, 0:SIZE].astype(np.float32)
    cy, cx = rng.uniform(13, 19, size=2)
    radius = rng.uniform(9, 12)
    disc = ((yy - cy) ** 2 + (xx - cx) ** 2 <= radius ** 2).astype(np.float32)
    grey = 0.25 + 0.45 * disc + rng.normal(0, 0.03, (SIZE, SIZE)).astype(np.float32)
    img = np.repeat(grey[None], 3, axis=0)
    img[2] += 0.03  # a slightly bluish light
    return img, (cy, cx, radius)


def _scratch(img: np.ndarray, where: tuple, rng: np.random.Generator) -> None:
    cy, cx, r = where
    angle = rng.uniform(0, np.pi)
    for t in np.linspace(-0.8 * r, 0.8 * r, 60):
        y, x = int(round(cy + t * np.sin(angle))), int(round(cx + t * np.cos(angle)))
        if 0 <= y < SIZE and 0 <= x < SIZE:
            img[:, y, x] = 0.95


def _spot(img: np.ndarray, where: tuple, rng: np.random.Generator, tint: np.ndarray,
          strength: float) -> None:
    cy, cx, r = where
    sy, sx = cy + rng.uniform(-0.5, 0.5) * r, cx + rng.uniform(-0.5, 0.5) * r
    yy, xx = np.mgrid[0:SIZE, 0:SIZE].astype(np.float32)
    blob = np.exp(-((yy - sy) ** 2 + (xx - sx) ** 2) / (2 * rng.uniform(1.5, 3.0) ** 2))
    img += strength * tint[:, None, None] * blob[None]


def images(n: int, kinds: list[str], rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """``n`` images with labels drawn evenly from ``kinds`` (defects, and stains)."""
    x = np.empty((n, 3, SIZE, SIZE), np.float32)
    y = np.arange(n) % len(kinds)
    rng.shuffle(y)
    for i, label in enumerate(y):
        img, where = _part(rng)
        kind = kinds[label]
        # Any image may also carry one of the other defects, so that each task is about
        # its own defect only.
        if kind == "scratch" or (kind in STAIN and rng.random() < 0.3):
            _scratch(img, where, rng)
        if kind == "dent" or (kind in STAIN and rng.random() < 0.3):
            _spot(img, where, rng, np.array([1.0, 1.0, 1.0], np.float32), -0.35)
        if kind == "stain":
            _spot(img, where, rng, np.array([0.15, -0.05, -0.35], np.float32), 1.0)
        x[i] = np.clip(img, 0.0, 1.0)
    return x, y.astype(np.int64)


class StationClassifier(nn.Module):
    """The station's existing defect classifier (invented): three conv stages and a head."""

    def __init__(self) -> None:
        super().__init__()
        self.stage1 = nn.Sequential(nn.Conv2d(3, 8, 3, padding=1), nn.BatchNorm2d(8),
                                    nn.ReLU(), nn.MaxPool2d(2))
        self.stage2 = nn.Sequential(nn.Conv2d(8, 16, 3, padding=1), nn.BatchNorm2d(16),
                                    nn.ReLU(), nn.MaxPool2d(2))
        self.stage3 = nn.Sequential(nn.Conv2d(16, 32, 3, padding=1), nn.BatchNorm2d(32),
                                    nn.ReLU())
        self.pool = nn.AdaptiveMaxPool2d(1)  # a defect is local: where it is strongest
        self.fc = nn.Linear(32, len(DEFECTS))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        h = self.stage3(self.stage2(self.stage1(x)))
        return self.fc(torch.flatten(self.pool(h), 1))


def train_classifier(x: np.ndarray, y: np.ndarray, seed: int) -> StationClassifier:
    torch.manual_seed(seed)
    model = StationClassifier()
    opt = torch.optim.Adam(model.parameters(), lr=3e-3)
    xt, yt = torch.from_numpy(x), torch.from_numpy(y)
    for _epoch in range(10):
        order = torch.randperm(len(xt))
        for i in range(0, len(xt), 64):
            idx = order[i:i + 64]
            loss = nn.functional.cross_entropy(model(xt[idx]), yt[idx])
            opt.zero_grad()
            loss.backward()
            opt.step()
    return model.eval()


def export_onnx(model: nn.Module, path: str) -> list[str]:
    """Write the classifier as ONNX with a dynamic batch; return the tap value names."""
    import onnx

    buf = io.BytesIO()
    with warnings.catch_warnings():  # the TorchScript-based exporter warns that it is legacy
        warnings.simplefilter("ignore")
        torch.onnx.export(model, (torch.zeros(2, 3, SIZE, SIZE),), buf, dynamo=False,
                          input_names=["image"], output_names=["defect_logits"],
                          dynamic_axes={"image": {0: "batch"}, "defect_logits": {0: "batch"}})
    with open(path, "wb") as f:
        f.write(buf.getvalue())
    values = [o for node in onnx.load_from_string(buf.getvalue()).graph.node for o in node.output]
    # The last value of stage 2 and of stage 3, and the pooled features.
    return [next(v for v in reversed(values) if v.startswith(f"/{stage}/"))
            for stage in ("stage2", "stage3", "pool")]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--out", required=True)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    os.makedirs(args.out, exist_ok=True)
    torch.set_num_threads(1)
    rng = np.random.default_rng(args.seed)
    x, y = images(600, DEFECTS, rng)
    model = train_classifier(x, y, args.seed)
    with torch.no_grad():
        xp, yp = images(60, DEFECTS, rng)
        accuracy = float((model(torch.from_numpy(xp)).argmax(1).numpy() == yp).mean())
    taps = export_onnx(model, os.path.join(args.out, "station_classifier.onnx"))
    with open(os.path.join(args.out, "taps.txt"), "w", encoding="utf-8") as f:
        f.write(",".join(taps) + "\n")
    np.savez(os.path.join(args.out, "defects_probe.npz"), x=xp, y=yp)
    xs, ys = images(600, STAIN, rng)
    np.savez(os.path.join(args.out, "oil_stain.npz"), x=xs, y=ys)
    xs, ys = images(40, STAIN, rng)
    np.savez(os.path.join(args.out, "oil_stain_probe.npz"), x=xs, y=ys)
    print(f"station classifier ({', '.join(DEFECTS)}): probe accuracy {accuracy:.2f}; "
          f"taps {', '.join(taps)}; files in {args.out}")


if __name__ == "__main__":
    main()
