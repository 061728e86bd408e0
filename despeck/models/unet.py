"""Compact U-Net: a multi-scale residual network with a large receptive field at low cost.

Each level runs two 3x3 convolutions with ReLU; the encoder halves the resolution
with 2x2 average pooling, the decoder doubles it with a 2x2 transposed convolution
and concatenates the encoder features of the same scale. Most of the arithmetic
happens at reduced resolution, so the receptive field grows much faster than the cost.
Like :mod:`despeck.models.logcnn` the output is residual, ``z - f(z)``, in the
normalised log domain, and there are no normalisation layers.

With ``unshuffle=2`` the network first folds each 2 x 2 block of the log-intensity
plane into four channels (pixel unshuffle, the reversible downsampling of FFDNet) and
unfolds four output channels at the end, so every level runs at half the resolution or
less: the full-resolution feature maps, a large share of a small U-Net's inference
time on a CPU, are never built (faster, but weaker on correlated single-look speckle in
the project's one trial: see the starter model card). The conditioning planes are constant and are sampled, not
folded.

Inputs whose sides are not multiples of ``unshuffle * 2 ** levels`` are padded by reflection
(replication for inputs too small to reflect) up to the next multiple and the output
is cropped back, so any size works, odd ones included. Because the pooling grid
follows the tile origin, tiled inference with a U-Net is close to, but not bit-for-bit
equal to, whole-scene inference; blending overlapping tiles hides the difference.

References
----------
Ronneberger, O., Fischer, P., Brox, T. (2015). U-Net: convolutional networks for
biomedical image segmentation. MICCAI 2015, LNCS 9351, 234-241, arXiv:1505.04597.

Zhang, K., Zuo, W., Zhang, L. (2018). FFDNet: toward a fast and flexible solution for
CNN-based image denoising. IEEE Trans. Image Processing 27(9), 4608-4622 (the
reversible 2 x 2 downsampling of the input and the noise-level map as an input plane).
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn

from ..errors import InputError
from .registry import check_int, register_model

__all__ = ["UNet", "deepened"]


def _block(cin, cout):
    return nn.Sequential(
        nn.Conv2d(cin, cout, 3, padding=1), nn.ReLU(inplace=True),
        nn.Conv2d(cout, cout, 3, padding=1), nn.ReLU(inplace=True),
    )


def _joined_conv(block, a, b):
    """``block(torch.cat([a, b], dim=1))`` without building the concatenation.

    The first convolution of the block is applied to each part with its half of the
    weights and the results summed (the same sum of products, regrouped): a channel
    concatenation of two channels-last maps is a slow interleaving copy on the CPU,
    more than a quarter of a decoder convolution's time at full resolution (measured
    with torch 2.13 on two cores: 816 x 816, 16 + 16 channels, 80 ms against 67 ms).
    """
    conv, rest = block[0], block[1:]
    ca = a.shape[1]
    y = F.conv2d(a, conv.weight[:, :ca], conv.bias, padding=conv.padding)
    y = y.add_(F.conv2d(b, conv.weight[:, ca:], None, padding=conv.padding))
    return rest(y)


@register_model(
    "unet-cond-h", widths=[32, 64, 96], condition_channels=3, unshuffle=2,
    description="looks- and correlation-conditioned residual U-Net at half resolution (2x2 pixel unshuffle), "
                "32-64-96 channels (~376k parameters); about 1.3x the speed of unet-cond-s, but weaker on "
                "correlated single-look speckle in the project's trial (see the starter model card)",
)
@register_model(
    "unet-cond-l", widths=[16, 32, 64, 96, 128], condition_channels=3,
    description="looks- and correlation-conditioned residual U-Net, 4 downsamplings, 16-32-64-96-128 channels "
                "(~948k parameters, receptive field 231 px; unet-cond-m with one more level, about 1.1x its time)",
)
@register_model(
    "unet-cond-m", widths=[16, 32, 64, 96], condition_channels=3,
    description="looks- and correlation-conditioned residual U-Net, 3 downsamplings, 16-32-64-96 channels "
                "(~391k parameters, receptive field 111 px; the bundled starter)",
)
@register_model(
    "unet-cond-s", widths=[16, 32, 64], condition_channels=3,
    description="looks- and correlation-conditioned residual U-Net, 16-32-64 channels (~117k parameters)",
)
@register_model(
    "unet-cond-xs", widths=[8, 16], condition_channels=3,
    description="looks- and correlation-conditioned residual U-Net, 8-16 channels, for tests",
)
@register_model(
    "unet-m", widths=[16, 32, 64, 128],
    description="residual U-Net, 3 downsamplings, 16-32-64-128 channels (~470k parameters)",
)
@register_model(
    "unet-s", widths=[16, 32, 64],
    description="residual U-Net, 2 downsamplings, 16-32-64 channels (~117k parameters)",
)
@register_model(
    "unet-xs", widths=[8, 16],
    description="residual U-Net, 1 downsampling, 8-16 channels (~6k parameters), for tests and quick trials",
)
class UNet(nn.Module):
    """Residual U-Net in the normalised log domain.

    Parameters
    ----------
    widths : list of int
        Channels per level, finest first; ``len(widths) - 1`` downsampling steps.
    condition_channels : int
        Constant conditioning planes after the log-intensity plane (0: none).
    unshuffle : int
        1, or 2 to fold 2 x 2 pixel blocks into channels before the first level and
        unfold them after the last.

    Attributes
    ----------
    size_multiple : int
        ``unshuffle * 2 ** levels``: inputs are padded to a multiple of it; tiled inference aligns tile
        origins to it so every tile sees the scene's pooling grid.
    receptive_field : int
        An odd upper bound of the side of the square of input pixels that can influence
        one output pixel (computed layer by layer; the tests check it empirically).
    """

    def __init__(self, *, widths=(16, 32, 64), condition_channels=0, unshuffle=1):
        super().__init__()
        self.condition_channels = check_int("condition_channels", condition_channels, 0)
        self.unshuffle = check_int("unshuffle", unshuffle, 1)
        if self.unshuffle not in (1, 2):
            raise InputError(f"model argument unshuffle must be 1 or 2, got {unshuffle!r}")
        if isinstance(widths, (int, str)) or len(widths) < 2:
            raise InputError(f"model argument widths must list at least two channel counts, got {widths!r}")
        widths = [check_int("widths", w, 1) for w in widths]
        self.widths = widths
        self.levels = len(widths) - 1
        self.encoders = nn.ModuleList()
        cin = self.unshuffle ** 2 + self.condition_channels
        for w in widths[:-1]:
            self.encoders.append(_block(cin, w))
            cin = w
        self.bottleneck = _block(widths[-2], widths[-1])
        self.ups = nn.ModuleList()
        self.decoders = nn.ModuleList()
        for level in reversed(range(self.levels)):
            self.ups.append(nn.ConvTranspose2d(widths[level + 1], widths[level], 2, stride=2))
            self.decoders.append(_block(2 * widths[level], widths[level]))
        self.head = nn.Conv2d(widths[0], self.unshuffle ** 2, 1)
        self.receptive_field = self._receptive_field()
        # Tiles whose origin is a multiple of this see the same pooling grid as the scene.
        self.size_multiple = self.unshuffle * 2 ** self.levels
        self._init_weights()

    def _receptive_field(self) -> int:
        # Walk down and up the deepest path adding (kernel - 1) * jump per layer; a 2x2
        # pooling adds one pixel at its input scale and a 2x2 stride-2 transposed conv
        # adds at most one at its input scale (its outputs each see one input pixel,
        # but which one depends on parity, so count it as a 2-wide kernel).
        # An unshuffle by s is an s x s stride-s convolution at the start and its
        # transpose at the end: s - 1 pixels each at full resolution.
        s = self.unshuffle
        rf, jump = 1 + 2 * (s - 1), s
        for _ in range(self.levels):
            rf += 2 * 2 * jump      # two 3x3 convolutions
            rf += 1 * jump          # 2x2 average pooling
            jump *= 2
        rf += 2 * 2 * jump          # bottleneck
        for _ in range(self.levels):
            rf += 1 * jump          # 2x2 transposed convolution
            jump //= 2
            rf += 2 * 2 * jump      # decoder block
        return rf if rf % 2 == 1 else rf + 1

    def _init_weights(self):
        for m in self.modules():
            if isinstance(m, (nn.Conv2d, nn.ConvTranspose2d)):
                nn.init.kaiming_normal_(m.weight, nonlinearity="relu")
                nn.init.zeros_(m.bias)
        with torch.no_grad():
            self.head.weight.mul_(0.1)

    def forward(self, z: torch.Tensor) -> torch.Tensor:
        """Map normalised log-intensity ``(N, 1, H, W)`` to its despeckled estimate, same shape.

        A conditioned network (``condition_channels`` > 0) takes ``(N, 1 + C, H, W)``:
        the log-intensity plane followed by C constant conditioning planes (FiLM-free
        conditioning by extra input planes, as noise-level maps are given to
        denoisers); the output has one plane.
        """
        h, w = z.shape[-2:]
        m = self.size_multiple
        ph, pw = (-h) % m, (-w) % m
        x = z
        if ph or pw:
            # Reflection needs the pad to be smaller than the side; replicate otherwise.
            mode = "reflect" if ph < h and pw < w else "replicate"
            x = F.pad(z, (0, pw, 0, ph), mode=mode)
        if self.unshuffle > 1:
            s = self.unshuffle
            x = torch.cat([F.pixel_unshuffle(x[:, :1], s), x[:, 1:, ::s, ::s]], dim=1)
        skips = []
        for enc in self.encoders:
            x = enc(x)
            skips.append(x)
            x = F.avg_pool2d(x, 2)
        x = self.bottleneck(x)
        for up, dec in zip(self.ups, self.decoders):
            x = _joined_conv(dec, up(x), skips.pop())
        noise = self.head(x)
        if self.unshuffle > 1:
            noise = F.pixel_shuffle(noise, self.unshuffle)
        noise = noise[..., :h, :w]
        return z[:, :1] - noise

    def extra_repr(self) -> str:
        return (f"widths={self.widths}, condition_channels={self.condition_channels}, "
                f"unshuffle={self.unshuffle}, receptive_field={self.receptive_field}")


def deepened(network: UNet, width: int, *, seed: int = 0) -> UNet:
    """A U-Net with one more level below ``network``'s that computes the same function.

    The old bottleneck becomes the deepest encoder block; below it come a new
    bottleneck of ``width`` channels (random, He initialisation) and a new transposed
    convolution and decoder block. The new decoder block starts as the identity on its
    skip input (the old bottleneck's output, non-negative after its ReLU, so the ReLUs
    pass it unchanged) and its weights on the new upsampled path start at zero (the
    path itself keeps random weights, so those zeros get a gradient at the first step):
    the deeper network's output equals the old one's at the start, and training grows
    the new level's contribution from there (the zero-initialised branch of a residual
    block, Goyal et al. 2017, "Accurate, large minibatch SGD", section 5.1). The receptive
    field roughly doubles (111 -> 231 pixels from unet-cond-m).

    ``network`` must come from :func:`despeck.models.create_model`; the result does too,
    under the registered name whose widths match, if any (``unet-cond-m`` + 128 ->
    ``unet-cond-l``), otherwise under the old name with ``widths`` overridden.
    """
    from .registry import create_model, list_models, model_defaults

    if not isinstance(network, UNet) or network.unshuffle != 1:
        raise InputError("deepening needs a U-Net without pixel unshuffle")
    width = check_int("width", width, 1)
    widths = [*network.widths, width]
    kwargs = {**network.architecture_kwargs, "widths": widths}
    name = next((n for n in list_models() if model_defaults(n) == kwargs), network.architecture)
    torch.manual_seed(seed)
    deep = create_model(name, **({} if model_defaults(name) == kwargs else {"widths": widths}))
    old, new = network.state_dict(), deep.state_dict()
    n = network.levels
    moved = {}
    for key, value in old.items():
        part, rest = key.split(".", 1)
        if part == "bottleneck":
            moved[f"encoders.{n}.{rest}"] = value
        elif part in ("ups", "decoders"):
            index, tail = rest.split(".", 1)
            moved[f"{part}.{int(index) + 1}.{tail}"] = value
        else:
            moved[key] = value
    c = widths[-2]
    eye = torch.zeros(c, c, 3, 3)
    eye[torch.arange(c), torch.arange(c), 1, 1] = 1.0
    first = torch.zeros(c, 2 * c, 3, 3)
    first[:, c:] = eye              # the skip half (the upsampled half comes first)
    moved.update({
        "decoders.0.0.weight": first, "decoders.0.0.bias": torch.zeros(c),
        "decoders.0.2.weight": eye.clone(), "decoders.0.2.bias": torch.zeros(c),
    })
    new.update(moved)
    deep.load_state_dict(new)
    return deep
