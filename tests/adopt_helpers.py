"""Helpers of the adoption tests: a ResNet-18 with random weights and digits as 3x64x64 images.

torchvision does not import beside the torch pinned for this project (2.13.0), so the
ResNet-18 is written out here: He et al. 2016, "Deep Residual Learning for Image
Recognition", Table 1 (the 18-layer network: a 7x7/2 convolution, 3x3/2 max pooling,
four stages of two BasicBlocks with 64, 128, 256 and 512 channels, global average
pooling, one fully connected layer), with torchvision's module names (conv1, bn1, layer1
.. layer4, avgpool, fc) and its initialisation (Kaiming normal, fan-out, for
convolutions; from memory of torchvision's resnet.py). Weights are random, as with
torchvision's ``weights=None``.

Data: scikit-learn's bundled handwritten digits (8x8), upsampled 8x by repeating each
pixel to 64x64 and tiled to 3 channels.
"""

from __future__ import annotations

import numpy as np
import torch
import torch.nn as nn

__all__ = ["ResNet18", "digit_images", "inspection_spec", "small_cnn", "TAPS"]

TAPS = ["layer2", "layer3", "avgpool"]


class BasicBlock(nn.Module):
    """Two 3x3 convolutions with batch norm and a shortcut (He et al. 2016, Fig. 2)."""

    def __init__(self, inp: int, out: int, stride: int = 1) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(inp, out, 3, stride, 1, bias=False)
        self.bn1 = nn.BatchNorm2d(out)
        self.relu = nn.ReLU(inplace=True)
        self.conv2 = nn.Conv2d(out, out, 3, 1, 1, bias=False)
        self.bn2 = nn.BatchNorm2d(out)
        self.downsample = None
        if stride != 1 or inp != out:  # projection shortcut (option B of the paper)
            self.downsample = nn.Sequential(nn.Conv2d(inp, out, 1, stride, bias=False),
                                            nn.BatchNorm2d(out))

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        identity = x if self.downsample is None else self.downsample(x)
        out = self.relu(self.bn1(self.conv1(x)))
        out = self.bn2(self.conv2(out))
        return self.relu(out + identity)


class ResNet18(nn.Module):
    def __init__(self, classes: int = 10) -> None:
        super().__init__()
        self.conv1 = nn.Conv2d(3, 64, 7, 2, 3, bias=False)
        self.bn1 = nn.BatchNorm2d(64)
        self.relu = nn.ReLU(inplace=True)
        self.maxpool = nn.MaxPool2d(3, 2, 1)
        self.layer1 = nn.Sequential(BasicBlock(64, 64), BasicBlock(64, 64))
        self.layer2 = nn.Sequential(BasicBlock(64, 128, 2), BasicBlock(128, 128))
        self.layer3 = nn.Sequential(BasicBlock(128, 256, 2), BasicBlock(256, 256))
        self.layer4 = nn.Sequential(BasicBlock(256, 512, 2), BasicBlock(512, 512))
        self.avgpool = nn.AdaptiveAvgPool2d((1, 1))
        self.fc = nn.Linear(512, classes)
        for m in self.modules():
            if isinstance(m, nn.Conv2d):
                nn.init.kaiming_normal_(m.weight, mode="fan_out", nonlinearity="relu")

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        x = self.maxpool(self.relu(self.bn1(self.conv1(x))))
        x = self.layer4(self.layer3(self.layer2(self.layer1(x))))
        return self.fc(torch.flatten(self.avgpool(x), 1))


def small_cnn(classes: int = 4) -> nn.Module:
    """A tiny convolutional classifier for the fast refusal tests (3x16x16 inputs)."""
    torch.manual_seed(0)
    return nn.Sequential(nn.Conv2d(3, 4, 3, 2, 1), nn.ReLU(), nn.Conv2d(4, 8, 3, 2, 1),
                         nn.ReLU(), nn.AdaptiveAvgPool2d(1), nn.Flatten(),
                         nn.Linear(8, classes)).eval()


def digit_images(seed: int = 0) -> tuple[np.ndarray, np.ndarray]:
    """All 1,797 digits as float32 [N, 3, 64, 64] in [0, 1], shuffled by ``seed``."""
    from sklearn.datasets import load_digits

    d = load_digits()
    x = np.kron(d.images.astype(np.float32) / 16.0, np.ones((1, 8, 8), np.float32))
    x = np.repeat(x[:, None], 3, axis=1)
    order = np.random.default_rng(seed).permutation(len(x))
    return np.ascontiguousarray(x[order]), d.target[order].astype(np.int64)


def inspection_spec(**train) -> dict:
    """The columns grown beside the adopted ResNet: small, strided convolutions, then dense.

    Four blocks, so the three taps feed blocks 1, 2 and 3 (conv, conv, dense).
    """
    return {"name": "inspection", "input": [3, 64, 64],
            "column": [{"conv2d": 8, "kernel": 3, "stride": 2, "padding": 1}, {"act": "relu"},
                       {"conv2d": 8, "kernel": 3, "stride": 2, "padding": 1}, {"act": "relu"},
                       {"conv2d": 8, "kernel": 3, "stride": 2, "padding": 1}, {"act": "relu"},
                       {"pool": "global_avg"}, {"dense": 16}, {"act": "relu"}],
            "lateral": {"kind": "nonlinear", "reduce": 0.125},
            "train": {"optimizer": "adam", "lr": 0.01, "epochs": 6, "batch_size": 32,
                      "patience": 6, "seed": 0, **train}}
