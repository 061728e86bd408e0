"""Residual log-domain CNN: a plain stack of 3x3 convolutions that predicts the log-speckle.

The network sees the normalised log-intensity ``z`` and returns ``z - f(z)``, where
``f`` is a stack of ``depth`` 3x3 convolutions (ReLU between them, no normalisation
layers) that estimates the speckle's log-domain component. Without normalisation
layers the output at a pixel depends only on the ``(2 * depth + 1)``-pixel square
around it, so tiled inference with that much overlap reproduces whole-scene inference
exactly. Zero padding in the normalised domain means "scene-mean log-intensity" at the
borders; the tiler gives every tile enough overlap that padding never reaches kept
pixels.

References
----------
Chierchia, G., Cozzolino, D., Poggi, G., Verdoliva, L. (2017). SAR image despeckling
through convolutional neural networks. IGARSS 2017, arXiv:1704.00275.
Zhang, K., Zuo, W., Chen, Y., Meng, D., Zhang, L. (2017). Beyond a Gaussian denoiser:
residual learning of deep CNN for image denoising. IEEE TIP 26(7), 3142-3155,
doi:10.1109/TIP.2017.2662206.
"""

from __future__ import annotations

import torch
from torch import nn

from ..errors import InputError
from .registry import check_int, register_model

__all__ = ["LogCNN"]


def _params(depth, width):
    return (9 + 1) * width + (depth - 2) * (9 * width + 1) * width + 9 * width + 1


@register_model(
    "logcnn-m", depth=17, width=64,
    description=f"residual log CNN, 17 layers x 64 channels (~{_params(17, 64) / 1e3:.0f}k parameters)",
)
@register_model(
    "logcnn-s", depth=10, width=40,
    description=f"residual log CNN, 10 layers x 40 channels (~{_params(10, 40) / 1e3:.0f}k parameters), the default",
)
@register_model(
    "logcnn-xs", depth=6, width=16,
    description=f"residual log CNN, 6 layers x 16 channels (~{_params(6, 16) / 1e3:.0f}k parameters), for tests and quick trials",
)
class LogCNN(nn.Module):
    """Residual stack of 3x3 convolutions in the normalised log domain.

    Parameters
    ----------
    depth : int
        Number of convolution layers (>= 2); the receptive field is ``2 * depth + 1``.
    width : int
        Feature channels of the hidden layers.
    dilations : list of int or None
        Optional dilation per hidden layer (``depth - 2`` entries) to widen the
        receptive field at no extra cost; ``None`` means all 1.

    Notes
    -----
    The last layer starts with small weights (one tenth of the usual He scale) so the
    untrained network is close to the identity, which keeps the first steps stable
    without normalisation layers, while every parameter still receives a gradient.
    """

    def __init__(self, *, depth: int = 10, width: int = 40, dilations=None):
        super().__init__()
        depth = check_int("depth", depth, 2)
        width = check_int("width", width, 1)
        if dilations is None:
            dilations = [1] * (depth - 2)
        dilations = [check_int("dilations", d, 1) for d in dilations]
        if len(dilations) != depth - 2:
            raise InputError(
                f"model argument dilations needs depth - 2 = {depth - 2} entries, got {len(dilations)}"
            )
        layers = [nn.Conv2d(1, width, 3, padding=1), nn.ReLU(inplace=True)]
        for d in dilations:
            layers += [nn.Conv2d(width, width, 3, padding=d, dilation=d), nn.ReLU(inplace=True)]
        layers.append(nn.Conv2d(width, 1, 3, padding=1))
        self.body = nn.Sequential(*layers)
        self.depth = depth
        self.width = width
        self.receptive_field = 1 + 2 * (2 + sum(dilations))
        self.size_multiple = 1  # no pooling: every pixel is processed alike
        self._init_weights()

    def _init_weights(self):
        convs = [m for m in self.body if isinstance(m, nn.Conv2d)]
        for conv in convs:
            nn.init.kaiming_normal_(conv.weight, nonlinearity="relu")
            nn.init.zeros_(conv.bias)
        with torch.no_grad():
            convs[-1].weight.mul_(0.1)

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        """Map normalised log-intensity ``(N, 1, H, W)`` to its despeckled estimate, same shape."""
        return z - self.body(z)

    def extra_repr(self) -> str:
        return f"depth={self.depth}, width={self.width}, receptive_field={self.receptive_field}"
