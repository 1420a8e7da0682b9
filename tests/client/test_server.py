"""The client against the real `befit serve` with the blocks-v1 bundle:
registration, every scale and baseline checked against vectors from
`/v1/vectors`, ragged groups, chunking under the server's limits, typed
errors, and model pinning."""

from __future__ import annotations

import hashlib
import io

import numpy as np
import pytest
from befit_client import (
    Client,
    ImageId,
    InvalidFieldError,
    Limits,
    ModelMismatchError,
    OverLimitError,
    PathRefusedError,
    RequestTooLargeError,
    ServerPath,
    UnknownImageError,
    UnknownMapError,
    UnknownModelError,
    affine,
    clip_s,
    encode_png,
    ref_clip_s,
)

from .client_env import PROBE_DIR


@pytest.fixture
def client(befit):
    with Client(befit.url) as c:
        yield c


@pytest.fixture(scope="module")
def rows(probe_rows):
    return probe_rows[:12]


def paths(rows):
    return [PROBE_DIR / r["image"] for r in rows]


def test_ready_and_models_name_the_bundle(client):
    assert client.wait_ready(timeout=5) == ["blocks@v1"]
    default, models = client.models()
    assert default == "blocks@v1"
    (m,) = models
    assert (m.info.name, m.info.version, m.dimension) == ("blocks", "v1", 64)
    assert len(m.info.digest) == 64 and int(m.info.digest, 16) >= 0
    assert client.model_info() == m.info


def test_register_ids_are_local_sha256_and_not_sent_twice(client, rows):
    files = paths(rows[:3])
    ids = client.register_images(files)
    assert ids == [hashlib.sha256(p.read_bytes()).hexdigest() for p in files]
    sent = client.transport.requests_sent
    again = client.register_images(files + [files[0]])
    assert again == ids + [ids[0]]
    assert client.transport.requests_sent == sent  # known ids: nothing sent
    client.register_images(files, force=True)
    assert client.transport.requests_sent == sent + 1  # one chunk of three


def test_arrays_pil_images_and_server_paths_register(client, rows):
    PIL = pytest.importorskip("PIL.Image")
    path = PROBE_DIR / rows[0]["image"]
    pixels = np.asarray(PIL.open(path).convert("RGB"))
    own_png = encode_png(pixels)
    ids = client.register_images([pixels, PIL.open(io.BytesIO(own_png)), ServerPath(rows[0]["image"])])
    assert ids[0] == hashlib.sha256(own_png).hexdigest()
    assert ids[2] == hashlib.sha256(path.read_bytes()).hexdigest()
    # Same pixels, other bytes: same embedding whatever the encoding.
    v = client.vectors(ids)
    assert v.images.shape == (3, 64)
    np.testing.assert_allclose(v.images[0], v.images[2], atol=1e-5)
    np.testing.assert_allclose(np.linalg.norm(v.images, axis=1), 1.0, atol=1e-5)


def test_cosine_is_the_dot_of_the_vectors(client, rows):
    captions = [r["captions"][:3] + [r["contrasts"][0]["caption"]] for r in rows]
    out = client.rewards(paths(rows), captions)
    assert out.cosine.shape == (len(rows), 4) and not out.ragged
    assert out.model.id == "blocks@v1" and len(out.model.digest) == 64
    v = client.vectors(paths(rows), [c for caps in captions for c in caps])
    expected = np.einsum("gd,gkd->gk", v.images, v.texts.reshape(len(rows), 4, -1))
    np.testing.assert_allclose(out.cosine, expected, atol=1e-4)
    np.testing.assert_array_equal(out.reward, out.cosine)  # scale cosine, baseline none
    np.testing.assert_array_equal(out.advantage, out.reward)


def test_true_captions_score_above_their_contrasts(client, probe_rows):
    # The bundle's whole point: a caption true of the image beats one with a fact changed.
    rows = probe_rows[:60]
    out = client.rewards(paths(rows), [[r["captions"][0], r["contrasts"][0]["caption"]] for r in rows])
    assert (out.cosine[:, 0] > out.cosine[:, 1]).mean() > 0.7


def test_clip_s_and_affine_scales(client, rows):
    caps = [r["captions"][:2] for r in rows]
    cos = client.rewards(paths(rows), caps).cosine
    clip = client.rewards(paths(rows), caps, scale=clip_s(2.0))
    assert clip.scale == {"kind": "clip-s", "weight": 2.0}
    np.testing.assert_allclose(clip.reward, 2.0 * np.maximum(cos, 0), atol=1e-5)
    aff = client.rewards(paths(rows), caps, scale=affine(3.0, -1.0))
    np.testing.assert_allclose(aff.reward, 3.0 * cos - 1.0, atol=1e-5)


def test_ref_clip_s_is_the_harmonic_mean(client, rows):
    caps = [[r["contrasts"][0]["caption"], r["captions"][4]] for r in rows]
    refs = [r["captions"][:3] for r in rows]
    out = client.rewards(paths(rows), caps, scale=ref_clip_s(2.5), references=refs)
    # Hessel et al. 2021, eq. 2: H(w * max(cos(c, v), 0), max(max_r cos(c, r), 0)).
    v = client.vectors([], [c for g in caps for c in g] + [r for g in refs for r in g])
    cap_vec = v.texts[: 2 * len(rows)].reshape(len(rows), 2, -1)
    ref_vec = v.texts[2 * len(rows) :].reshape(len(rows), 3, -1)
    a = 2.5 * np.maximum(out.cosine, 0)
    b = np.maximum(np.einsum("gkd,grd->gkr", cap_vec, ref_vec).max(-1), 0)
    expected = np.where(a + b > 0, 2 * a * b / np.where(a + b > 0, a + b, 1), 0)
    np.testing.assert_allclose(out.reward, expected, atol=1e-4)


def test_mean_of_others_and_greedy_baselines(client, rows):
    caps = [r["captions"][:3] + [r["contrasts"][1]["caption"]] for r in rows]
    out = client.rewards(paths(rows), caps, baseline="mean-of-others")
    r = out.reward
    others = (r.sum(axis=1, keepdims=True) - r) / (r.shape[1] - 1)
    np.testing.assert_allclose(out.advantage, r - others, atol=1e-6)
    greedy = [row["captions"][4] for row in rows]
    sc = client.rewards(paths(rows), caps, baseline="greedy", greedy=greedy)
    assert not np.isnan(sc.greedy_reward).any()
    np.testing.assert_allclose(sc.advantage, sc.reward - sc.greedy_reward[:, None], atol=1e-6)
    # The greedy caption's own score is its cosine with the image.
    g = client.rewards(paths(rows), [[x] for x in greedy])
    np.testing.assert_allclose(sc.greedy_cosine, g.cosine[:, 0], atol=1e-5)


def test_ragged_groups_come_back_masked(client, rows):
    caps = [r["captions"][: 1 + i % 4] for i, r in enumerate(rows)]
    out = client.rewards(paths(rows), caps, baseline="none")
    assert out.ragged and out.cosine.shape == (len(rows), 4)
    np.testing.assert_array_equal(out.lengths, [1 + i % 4 for i in range(len(rows))])
    for i in range(len(rows)):
        alone = client.rewards(paths(rows[i : i + 1]), [caps[i]])
        np.testing.assert_allclose(out.group(i).cosine, alone.cosine[0], atol=1e-6)
    np.testing.assert_allclose(out.cosine.mean(axis=1), [out.group(i).cosine.mean() for i in range(len(rows))])


def test_small_client_limits_split_into_chunks_with_the_same_answer(befit, rows):
    caps = [r["captions"] for r in rows]
    whole = Client(befit.url).rewards(paths(rows), caps, baseline="mean-of-others")
    small = Client(befit.url, limits=Limits(max_groups=5, max_captions=11), max_workers=2)
    small.register_images(paths(rows))
    before = small.transport.requests_sent
    out = small.rewards(paths(rows), caps, baseline="mean-of-others")
    assert small.transport.requests_sent - before == 6  # 2 groups (10 captions) per request
    np.testing.assert_allclose(out.advantage, whole.advantage, atol=1e-6)
    assert out.image_ids == whole.image_ids


def test_server_limits_are_typed_errors_and_client_limits_fix_them(befit_copy, rows):
    caps = [r["captions"][:2] for r in rows[:6]]
    # Limits given by hand that are wrong for this server (--max-groups 4): its typed refusal.
    with pytest.raises(OverLimitError) as e:
        Client(befit_copy.url, limits=Limits()).rewards(paths(rows[:6]), caps)
    assert e.value.status == 400 and "max-groups" in e.value.message
    out = Client(befit_copy.url, limits=Limits(max_groups=4)).rewards(paths(rows[:6]), caps)
    assert out.reward.shape == (6, 2)


def test_by_default_the_client_splits_by_the_servers_own_limits(befit_copy, rows):
    caps = [r["captions"][:2] for r in rows[:6]]
    client = Client(befit_copy.url)
    client.register_images(paths(rows[:6]))
    assert client.limits.max_groups == 4  # read from GET /v1/limits, not the default 1024
    before = client.transport.requests_sent
    out = client.rewards(paths(rows[:6]), caps)
    assert client.transport.requests_sent - before == 2  # 6 groups in chunks of at most 4
    assert out.reward.shape == (6, 2)


def test_request_errors_carry_code_and_field(client, rows):
    img = paths(rows[:1])
    with pytest.raises(InvalidFieldError) as e:
        client.rewards(img, [[]])
    assert e.value.code == "invalid_field" and e.value.field == "groups[0].captions"
    with pytest.raises(UnknownModelError) as e:
        client.rewards(img, [["a red ring"]], model="nonesuch@v9")
    assert e.value.status == 404 and "blocks@v1" in e.value.message
    with pytest.raises(UnknownMapError):
        client.rewards(img, [["a red ring"]], remap="no-such-map")
    with pytest.raises(UnknownImageError) as e:
        client.rewards([ImageId("f" * 64)], [["a red ring"]])
    assert e.value.field is not None and e.value.field.startswith("groups[0].image")
    with pytest.raises(PathRefusedError):
        client.register_images([ServerPath("../../etc/passwd")])
    with pytest.raises(InvalidFieldError):
        client.rewards(img, [["a red ring"]], baseline="mean-of-others")  # needs 2+ captions


def test_pinned_digest_refuses_another_model(befit, befit_copy, rows):
    caps = [r["captions"][:2] for r in rows[:2]]
    digest = Client(befit.url).model_info().digest
    Client(befit.url, pin_digest=digest).rewards(paths(rows[:2]), caps)  # the pinned one: fine
    with pytest.raises(ModelMismatchError) as e:
        Client(befit_copy.url, pin_digest=digest).rewards(paths(rows[:2]), caps)
    assert e.value.expected == digest and e.value.got != digest and e.value.model_id == "blocks@v1-copy"


def test_pin_first_holds_across_a_server_swap(befit, befit_copy, rows):
    caps = [r["captions"][:2] for r in rows[:2]]
    client = Client(befit.url, pin_digest="first")
    assert client.pinned_digest is None
    first = client.rewards(paths(rows[:2]), caps)
    assert client.pinned_digest == first.model.digest
    # The same run pointed at a server with another bundle must not mix rewards.
    client.transport = Client(befit_copy.url).transport
    with pytest.raises(ModelMismatchError):
        client.rewards(paths(rows[:2]), caps)


def test_images_lost_by_the_server_are_registered_again(befit, befit_copy, rows):
    client = Client(befit.url)
    client.register_images(paths(rows[6:8]))
    # Another server, another data dir: it has never seen these images.
    client.transport = Client(befit_copy.url).transport
    out = client.rewards(paths(rows[6:8]), [r["captions"][:2] for r in rows[6:8]])
    assert out.reward.shape == (2, 2) and out.model.id == "blocks@v1-copy"


def test_local_argument_mistakes_fail_before_sending(client, rows):
    sent = client.transport.requests_sent
    with pytest.raises(TypeError, match="list of captions"):
        client.rewards(paths(rows[:1]), ["a red ring"])
    with pytest.raises(ValueError, match="one group per image"):
        client.rewards(paths(rows[:2]), [["a red ring"]])
    with pytest.raises(ValueError, match="baseline"):
        client.rewards(paths(rows[:1]), [["a red ring"]], baseline="mean")
    assert client.transport.requests_sent == sent


def test_registration_and_vectors_split_under_max_images(befit, rows):
    client = Client(befit.url, limits=Limits(max_images=2))
    files = paths(rows[:5])
    ids = client.register_images(files)
    assert client.transport.requests_sent == 3  # 2 + 2 + 1
    assert ids == [hashlib.sha256(p.read_bytes()).hexdigest() for p in files]
    v = client.vectors(ids, ["a red ring"])
    assert client.transport.requests_sent == 3 + 4  # 3 image requests, 1 text request
    whole = Client(befit.url).vectors(ids, ["a red ring"])
    np.testing.assert_allclose(v.images, whole.images, atol=1e-6)
    np.testing.assert_allclose(v.texts, whole.texts, atol=1e-6)
    assert v.image_ids == ids


def test_an_image_too_big_for_json_goes_as_a_raw_body(befit, rows):
    data = (PROBE_DIR / rows[3]["image"]).read_bytes()
    # Base64 of the image no longer fits 90% of the body limit, the raw bytes do.
    client = Client(befit.url, limits=Limits(max_body_bytes=len(data) + 16))
    (cid,) = client.register_images([data])
    assert cid == hashlib.sha256(data).hexdigest() and client.transport.requests_sent == 1
    small = Client(befit.url, limits=Limits(max_body_bytes=len(data) - 1))
    with pytest.raises(RequestTooLargeError) as e:
        small.register_images([data])
    assert e.value.limit == "max_body_bytes" and small.transport.requests_sent == 0
