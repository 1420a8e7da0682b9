"""The PyTorch encoders: the blocks dual encoder and the tiny CLIP wrappers.

Blocks image tower: a small strided CNN over the normalised 64x64 image. Its
last 4x4 feature map is flattened rather than averaged, because averaging
would throw away where things are and the captions talk about left and right.

Blocks text tower: token embedding and a one-way GRU over right-padded ids.
The caption vector comes from the GRU state at the last real token and the mean
of the states over real tokens. A one-way GRU never looks ahead, so padding
after the caption cannot change either: a caption embeds the same alone and in
a padded batch, which befit relies on.

CLIP wrappers: thin modules around a `transformers` `CLIPModel` whose outputs
are the projected embeddings, with the graph input names of the bundle.

Every tower ends in L2 normalisation, so ONNX outputs are unit vectors.
"""

from __future__ import annotations

import torch
import torch.nn.functional as F
from torch import nn


def _conv(cin: int, cout: int, k: int = 3, stride: int = 1) -> nn.Sequential:
    return nn.Sequential(
        nn.Conv2d(cin, cout, k, stride=stride, padding=k // 2, bias=False),
        nn.BatchNorm2d(cout),
        nn.ReLU(inplace=True),
    )


class ImageEncoder(nn.Module):
    """float32 [batch, 3, 64, 64] normalised pixels -> [batch, dim] unit vectors."""

    def __init__(self, width: int = 32, dim: int = 64, hidden: int = 256):
        super().__init__()
        w = width
        self.features = nn.Sequential(
            _conv(3, w, 5, 2),  # 32x32
            _conv(w, 2 * w, 3, 2),  # 16x16
            _conv(2 * w, 2 * w),
            _conv(2 * w, 4 * w, 3, 2),  # 8x8
            _conv(4 * w, 4 * w),
            _conv(4 * w, 4 * w, 3, 2),  # 4x4
        )
        self.head = nn.Sequential(nn.Flatten(), nn.Linear(4 * w * 16, hidden), nn.ReLU(inplace=True), nn.Linear(hidden, dim))

    def forward(self, pixels: torch.Tensor) -> torch.Tensor:
        return F.normalize(self.head(self.features(pixels)), dim=-1)


class PlaceHead(nn.Module):
    """Training-only probe: from an image embedding, where each colour and shape is.

    Outputs, per colour then per shape, a presence logit, the centre (x, y)
    in scene fractions and a "large" logit. Not exported: it exists so that the image embeddings
    carry positions from the start (see train.py), and it is dropped after
    training.
    """

    def __init__(self, dim: int, kinds: int):
        super().__init__()
        self.kinds = kinds
        self.linear = nn.Linear(dim, 4 * kinds)

    def forward(self, embedding: torch.Tensor) -> torch.Tensor:
        return self.linear(embedding).view(-1, self.kinds, 4)


def last_and_mean(states: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
    """[batch, tokens, width] states of a one-way RNN -> [batch, 2 * width]: the
    state at the last real token and the mean over real tokens."""
    mask = attention_mask.to(states.dtype)
    length = mask.sum(dim=1, keepdim=True).clamp(min=1.0)
    # The last real token is where the running count of real tokens reaches
    # the length; a one-hot select exports to plain ONNX ops.
    last_hot = (mask.cumsum(dim=1) == length).to(states.dtype) * mask
    last = (states * last_hot.unsqueeze(-1)).sum(dim=1)
    mean = (states * mask.unsqueeze(-1)).sum(dim=1) / length
    return torch.cat([last, mean], dim=-1)


class TextEncoder(nn.Module):
    """int64 ids and mask [batch, tokens], right padded -> [batch, dim] unit vectors."""

    def __init__(self, vocab: int, embed: int = 128, hidden: int = 256, dim: int = 64, pad_id: int = 0):
        super().__init__()
        self.embed = nn.Embedding(vocab, embed, padding_idx=pad_id)
        self.gru = nn.GRU(embed, hidden, batch_first=True)
        self.proj = nn.Linear(2 * hidden, dim)

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
        states, _ = self.gru(self.embed(input_ids))
        return F.normalize(self.proj(last_and_mean(states, attention_mask)), dim=-1)


class ClipImage(nn.Module):
    """`pixel_values` [batch, 3, 224, 224] -> projected, normalised image embedding."""

    def __init__(self, clip):
        super().__init__()
        self.clip = clip

    def forward(self, pixel_values: torch.Tensor) -> torch.Tensor:
        return F.normalize(_features(self.clip.get_image_features(pixel_values=pixel_values)), dim=-1)


class ClipText(nn.Module):
    """`input_ids`, `attention_mask` [batch, tokens] -> projected, normalised text embedding."""

    def __init__(self, clip):
        super().__init__()
        self.clip = clip

    def forward(self, input_ids: torch.Tensor, attention_mask: torch.Tensor) -> torch.Tensor:
        out = self.clip.get_text_features(input_ids=input_ids, attention_mask=attention_mask)
        return F.normalize(_features(out), dim=-1)


def _features(out) -> torch.Tensor:
    # Newer transformers return an output object from get_*_features; older a tensor.
    if isinstance(out, torch.Tensor):
        return out
    for name in ("pooler_output", "image_embeds", "text_embeds"):
        value = getattr(out, name, None)
        if value is not None:
            return value
    raise TypeError(f"unexpected feature output {type(out)}")
