"""The CLIP-layout exporter's pure parts against the committed clip-tiny bundle (no torch needed).

tools/clip_export.py was run on the checkpoint that tools/blocksworld/clip_tiny_checkpoint.py
rebuilds from clip-tiny's graphs, and wrote graphs and a bundle.toml byte-identical to the
committed ones (docs/bundles.md, "Bringing your own model"). CI has no PyTorch, so these tests
check what decides the bundle's settings from a checkpoint's files: the same inputs as that
checkpoint (its config's sizes and ids from clip-tiny's card, a preprocessor_config.json like the
one the rebuild writes) must give the committed bundle.toml byte for byte.
"""

import json
import sys
import tomllib
from pathlib import Path
from types import SimpleNamespace

import pytest

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO / "tools"))
import clip_export  # noqa: E402

BUNDLE = REPO / "fixtures" / "models" / "clip-tiny"
CARD = json.loads((BUNDLE / "card.json").read_text())
COMMITTED = tomllib.loads((BUNDLE / "bundle.toml").read_text())


def config(image_size=None, eos=None):
    """The parts of clip-tiny's CLIPConfig the exporter reads, from its card."""
    cfg = CARD["architecture"]["config"]
    return SimpleNamespace(
        projection_dim=cfg["projection_dim"],
        vision_config=SimpleNamespace(image_size=image_size or cfg["vision_config"]["image_size"]),
        text_config=SimpleNamespace(
            eos_token_id=cfg["text_config"]["eos_token_id"] if eos is None else eos,
            max_position_embeddings=cfg["text_config"]["max_position_embeddings"],
        ),
    )


@pytest.fixture
def checkpoint(tmp_path):
    size = COMMITTED["image"]["size"]
    (tmp_path / "preprocessor_config.json").write_text(json.dumps({
        "image_mean": COMMITTED["image"]["mean"], "image_std": COMMITTED["image"]["std"],
        "crop_size": {"height": size, "width": size}}))
    (tmp_path / "tokenizer.json").write_bytes((BUNDLE / "tokenizer.json").read_bytes())
    return tmp_path


def test_settings_from_a_checkpoint_give_the_committed_bundle_toml(checkpoint, tmp_path):
    cfg = config()
    image = clip_export.image_settings(checkpoint, cfg)
    tok = clip_export.bare_tokenizer(checkpoint / "tokenizer.json", tmp_path / "out-tokenizer.json")
    text = {"ids_input": "input_ids", "mask_input": "attention_mask", "output": "text_embeds",
            "max_tokens": cfg.text_config.max_position_embeddings, "pad_id": clip_export.pad_id(tok, cfg)}
    toml = clip_export.bundle_toml("clip-tiny", "v1", image, text, cfg.projection_dim)
    assert toml == (BUNDLE / "bundle.toml").read_text()


def test_without_a_processor_file_clip_published_normalisation_is_used(tmp_path):
    image = clip_export.image_settings(tmp_path, config())
    # Radford et al. 2021's released preprocessing (values from memory, as the committed
    # clip-tiny bundle also states them).
    assert image["mean"] == pytest.approx([0.48145466, 0.4578275, 0.40821073])
    assert image["std"] == pytest.approx([0.26862954, 0.26130258, 0.27577711])
    assert (image["resize"], image["filter"], image["size"]) == ("shorter-then-crop", "bicubic", 224)


def test_a_crop_that_disagrees_with_the_model_is_refused(checkpoint):
    with pytest.raises(SystemExit, match="crop size 224 differs"):
        clip_export.image_settings(checkpoint, config(image_size=256))


def test_the_tokenizer_loses_padding_and_truncation_and_must_know_the_end_token(tmp_path):
    source = tmp_path / "tok.json"
    tok = json.loads((BUNDLE / "tokenizer.json").read_text())
    tok["padding"] = {"strategy": "BatchLongest", "pad_id": 0}
    tok["truncation"] = {"max_length": 77}
    source.write_text(json.dumps(tok))
    bare = clip_export.bare_tokenizer(source, tmp_path / "out.json")
    assert bare["padding"] is None and bare["truncation"] is None
    assert json.loads((tmp_path / "out.json").read_text())["model"] == tok["model"]
    with pytest.raises(SystemExit, match="eos_token_id 999999"):
        clip_export.pad_id(bare, config(eos=999999))
