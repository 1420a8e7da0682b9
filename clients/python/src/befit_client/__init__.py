"""befit-client: rewards for captions from a befit server, for training loops.

Main calls::

    from befit_client import Client, clip_s
    client = Client("http://127.0.0.1:7878", pin_digest="first")
    ids = client.register_images(["scene0.png", pixels_uint8])
    out = client.rewards(ids, [["a red circle", "a blue ring"], ["two pieces", "a cross"]],
                         scale=clip_s(2.5), baseline="mean-of-others")
    out.reward, out.advantage   # numpy arrays, (groups, samples)
    out.model.digest            # which reward model answered

Modules: :mod:`.client` (the calls), :mod:`.transport` (HTTP, retries,
backoff), :mod:`.sharding` (several replicas: rendezvous routing and
failover; :class:`ShardedClient`), :mod:`.chunking` (the server's limits and request splitting),
:mod:`.images` (image sources, content ids, PNG encoding), :mod:`.results`
(answers as numpy arrays), :mod:`.errors` (typed errors).
"""

from .chunking import Limits
from .client import BASELINES, Client, affine, clip_s, cosine, ref_clip_s, scale_json
from .errors import (
    ApiError,
    BadImageError,
    BadJsonError,
    BefitError,
    BodyTooLargeError,
    ImageTooLargeError,
    RateLimitedError,
    HostRefusedError,
    CrossOriginError,
    ScopeMissingError,
    KeyRequiredError,
    InternalError,
    InvalidFieldError,
    MethodNotAllowedError,
    ModelMismatchError,
    NotFoundError,
    NotReadyError,
    OverLimitError,
    OverloadedError,
    PathRefusedError,
    ProtocolError,
    RequestTooLargeError,
    TransportError,
    UnknownImageError,
    UnknownMapError,
    UnknownModelError,
    UnsupportedMediaTypeError,
)
from .images import ImageId, ServerPath, content_id, encode_png
from .results import GroupRewards, ModelDetails, ModelInfo, Rewards, Vectors
from .sharding import ShardedClient, rendezvous_order, replica_urls
from .transport import NO_RETRY, RetryPolicy, parse_retry_after

__version__ = "0.1.0"

__all__ = [
    "ApiError",
    "BASELINES",
    "BadImageError",
    "BadJsonError",
    "BefitError",
    "BodyTooLargeError",
    "Client",
    "GroupRewards",
    "ImageId",
    "ImageTooLargeError",
    "RateLimitedError",
    "HostRefusedError",
    "CrossOriginError",
    "ScopeMissingError",
    "KeyRequiredError",
    "InternalError",
    "InvalidFieldError",
    "Limits",
    "MethodNotAllowedError",
    "ModelDetails",
    "ModelInfo",
    "ModelMismatchError",
    "NO_RETRY",
    "NotFoundError",
    "NotReadyError",
    "OverLimitError",
    "OverloadedError",
    "PathRefusedError",
    "ProtocolError",
    "RequestTooLargeError",
    "RetryPolicy",
    "Rewards",
    "ServerPath",
    "ShardedClient",
    "TransportError",
    "UnknownImageError",
    "UnknownMapError",
    "UnknownModelError",
    "UnsupportedMediaTypeError",
    "Vectors",
    "affine",
    "clip_s",
    "content_id",
    "cosine",
    "encode_png",
    "parse_retry_after",
    "ref_clip_s",
    "rendezvous_order",
    "replica_urls",
    "scale_json",
]
