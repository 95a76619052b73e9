"""A data generator trained by the tool itself: the decoder of a small variational autoencoder.

The ``trained_latent`` data kind (issue 3) needs inputs x = G(c) made by a generator G from
latent Gaussian codes c ~ N(0, I_D), where G has learned something about real images. This
module trains such a G with optax on the 8x8 handwritten digits that ship inside
scikit-learn (``sklearn.datasets.load_digits``: 1797 images, no download), optionally
upsampled to S x S pixels by bilinear interpolation, and caches the result on disk.

Model (a plain-JAX variational autoencoder; Kingma & Welling 2014, "Auto-Encoding
Variational Bayes"):
- pixels are scaled to [0, 1] (the bundled values are integers 0..16, divided by 16);
- encoder: N -> widths reversed (tanh) -> mean and log-variance of a diagonal Gaussian q(c|x);
- decoder (the generator): D -> widths (tanh) -> N logits; the generator output is the
  sigmoid of the logits, i.e. the mean pixel intensity in [0, 1];
- loss: the negative evidence lower bound per image, in nats: the Bernoulli cross-entropy of
  the pixel intensities (soft targets in [0, 1]; common practice for grey-scale digits, no
  source) plus KL(q(c|x) || N(0, I)), with one reparameterised sample per image.

What :func:`generator_apply` returns is the decoder mean in [0, 1], flattened row-major
(pixel (row, column) at index row * S + column). Centring and scaling the pixels is the
data model's business, not this module's.

The cache: one folder per generator name in the store, which is ``$HARNESS_GENERATORS``
if set, otherwise ``$XDG_CACHE_HOME/harness/generators`` (``~/.cache/harness/generators``
when XDG_CACHE_HOME is unset). A folder holds
- ``params.npz``: every weight and bias (keys ``decoder.<layer>.w`` / ``.b`` and
  ``encoder.<layer>.w`` / ``.b``, float64),
- ``params.npz.sha256``: its SHA-256 in the ``<hex>  params.npz`` line format,
- ``settings.json``: the training settings, architecture, data set and losses.
It is assembled in a hidden staging folder and renamed into place only when complete.
Training is deterministic given its settings (same settings, same machine: bit-identical
parameters).
"""

from __future__ import annotations

import functools
import hashlib
import io
import json
import math
import os
import re
import shlex
import time
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any, NamedTuple

import jax
import jax.numpy as jnp
import numpy as np

from harness.core.errors import InputError

if TYPE_CHECKING:
    import optax

# optax, pandas (via the results store) and scikit-learn are imported where they are used, so
# that `harness --help` and the scenario side of this module start without them.

Array = jax.Array
Params = dict[str, list[dict[str, Array]]]

FORMAT_VERSION = 1
PARAMS_FILE = "params.npz"
CHECKSUM_FILE = "params.npz.sha256"
SETTINGS_FILE = "settings.json"

ARCHITECTURE = "variational autoencoder, multilayer perceptron encoder and decoder"
HIDDEN_ACTIVATION = "tanh"
OUTPUT_ACTIVATION = "sigmoid"
DATA_SET = "sklearn.datasets.load_digits (1797 handwritten digits, 8x8, values 0..16 divided by 16)"
DIGIT_SIDE = 8

# The settings a user chooses; everything else in settings.json is derived or measured.
DEFAULT_SETTINGS: dict[str, Any] = {
    "latent_dim": 8,
    "image_size": 16,
    "hidden_widths": [64, 256],
    "epochs": 150,
    "seed": 0,
    "learning_rate": 2e-3,
    "batch_size": 64,
}
CHOSEN_KEYS = tuple(DEFAULT_SETTINGS)
MAX_IMAGE_SIZE = 64

_NAME_PATTERN = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.-]*")
# The training arithmetic is float64 like the rest of the package: the parameters feed Monte
# Carlo estimates of Omega and Phi, and the cost at these sizes is a few seconds either way.
_DTYPE = jnp.float64


class TrainedGenerator(NamedTuple):
    """A loaded generator: ``generator_apply(params, c)`` maps latents [B, D] to images [B, N]."""

    name: str
    latent_dim: int
    output_dim: int
    params: Params
    settings: dict
    checksum: str


# ----------------------------------------------------------------------------- the store


def default_store() -> Path:
    """``$HARNESS_GENERATORS``, else ``$XDG_CACHE_HOME/harness/generators``, else ``~/.cache/...``."""
    explicit = os.environ.get("HARNESS_GENERATORS")
    if explicit:
        return Path(explicit).expanduser()
    cache = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(cache).expanduser() / "harness" / "generators"


def _resolve_store(store: str | Path | None) -> Path:
    return default_store() if store is None else Path(store).expanduser()


def check_name(name: str) -> str:
    """A generator name is a folder name: letters, digits, '_', '.', '-', not starting with '.'."""
    if not isinstance(name, str) or not _NAME_PATTERN.fullmatch(name):
        raise InputError(
            f"generator name {name!r} is not allowed; use letters, digits, '_', '.', '-' "
            "(starting with a letter or digit)"
        )
    return name


def train_command(name: str, settings: Mapping[str, Any] | None = None, store: str | Path | None = None) -> str:
    """The exact command that trains generator ``name`` with ``settings`` (defaults elsewhere)."""
    settings = dict(settings or {})
    side = math.isqrt(int(settings.get("output_dim", 0)))
    if "image_size" not in settings and side >= DIGIT_SIDE and side * side == settings.get("output_dim"):
        settings["image_size"] = side  # a scenario may know only its input dimension N = S^2
    parts = ["harness", "generator", "train", "--name", name]
    for key in CHOSEN_KEYS:
        if key in settings and settings[key] != DEFAULT_SETTINGS[key]:
            value = settings[key]
            if key == "hidden_widths":
                value = ",".join(str(int(width)) for width in value)
            parts += [f"--{key.replace('_', '-')}", str(value)]
    if store is not None and Path(store).expanduser() != default_store():
        parts += ["--store", str(store)]
    return shlex.join(parts)


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


# ----------------------------------------------------------------------------- the data


def load_digit_images(image_size: int) -> np.ndarray:
    """The bundled digits as float64 rows in [0, 1], bilinearly resized to image_size^2 pixels."""
    from sklearn.datasets import load_digits

    images = load_digits().images.astype(np.float64) / 16.0  # [1797, 8, 8], values 0..16
    if image_size != DIGIT_SIDE:
        resized = jax.image.resize(
            jnp.asarray(images, dtype=_DTYPE), (images.shape[0], image_size, image_size), method="bilinear"
        )
        images = np.clip(np.asarray(resized), 0.0, 1.0)  # bilinear is a convex combination: clip is rounding only
    return images.reshape(images.shape[0], image_size * image_size)


# ----------------------------------------------------------------------------- the network


def _dense_stack(key: Array, widths: list[int]) -> list[dict[str, Array]]:
    """Layers widths[0] -> widths[1] -> ...; weights N(0, 1/fan_in) (LeCun normal), zero biases."""
    layers = []
    for index, (fan_in, fan_out) in enumerate(zip(widths[:-1], widths[1:], strict=True)):
        w = jax.random.normal(jax.random.fold_in(key, index), (fan_in, fan_out), dtype=_DTYPE) / math.sqrt(fan_in)
        layers.append({"w": w, "b": jnp.zeros((fan_out,), dtype=_DTYPE)})
    return layers


def init_params(key: Array, *, latent_dim: int, hidden_widths: list[int], output_dim: int,
                mean_image: np.ndarray) -> Params:
    """Fresh encoder and decoder; the decoder's output bias starts at the logit of the mean image."""
    decoder = _dense_stack(jax.random.fold_in(key, 0), [latent_dim, *hidden_widths, output_dim])
    encoder = _dense_stack(jax.random.fold_in(key, 1), [output_dim, *reversed(hidden_widths), 2 * latent_dim])
    # Starting from the mean image spares the first epochs from learning the background.
    p = np.clip(mean_image, 1e-3, 1 - 1e-3)
    decoder[-1]["b"] = jnp.asarray(np.log(p / (1 - p)), dtype=_DTYPE)
    return {"decoder": decoder, "encoder": encoder}


def _mlp(layers: list[dict[str, Array]], x: Array) -> Array:
    """tanh hidden layers, linear last layer."""
    for layer in layers[:-1]:
        x = jnp.tanh(x @ layer["w"] + layer["b"])
    return x @ layers[-1]["w"] + layers[-1]["b"]


def decoder_logits(params: Params, c: Array) -> Array:
    return _mlp(params["decoder"], c)


def generator_apply(params: Params, c: Array) -> Array:
    """Latent codes c [B, D] -> decoder mean images [B, N] in [0, 1] (row-major pixels). Jit-able."""
    return jax.nn.sigmoid(decoder_logits(params, c))


def encode(params: Params, x: Array) -> tuple[Array, Array]:
    """Images x [B, N] -> mean and log-variance [B, D] of the approximate posterior q(c|x)."""
    out = _mlp(params["encoder"], x)
    latent_dim = out.shape[-1] // 2
    return out[..., :latent_dim], out[..., latent_dim:]


def negative_elbo(params: Params, x: Array, key: Array) -> tuple[Array, tuple[Array, Array]]:
    """Mean over the batch of -ELBO (nats per image), with its reconstruction and KL parts.

    -ELBO = E_q[-log p(x|c)] + KL(q(c|x) || N(0, I)) (Kingma & Welling 2014, eq. 10), the KL of
    diagonal Gaussians in closed form (their appendix B), one reparameterised draw c = mu + s*eps.
    (Equation and appendix numbers from memory.)
    """
    mean, log_var = encode(params, x)
    eps = jax.random.normal(key, mean.shape, dtype=mean.dtype)
    c = mean + jnp.exp(0.5 * log_var) * eps
    # Bernoulli cross-entropy with logits z: -x log sigmoid(z) - (1-x) log(1-sigmoid(z)) = softplus(z) - x z.
    logits = decoder_logits(params, c)
    reconstruction = (jax.nn.softplus(logits) - x * logits).sum(axis=-1)
    kl = 0.5 * (jnp.exp(log_var) + mean**2 - 1.0 - log_var).sum(axis=-1)
    return (reconstruction + kl).mean(), (reconstruction.mean(), kl.mean())


@functools.lru_cache(maxsize=8)
def _make_epoch(learning_rate: float, batch_size: int, batches: int) -> tuple[optax.GradientTransformation, Callable]:
    """adam and one jitted epoch: a fresh permutation of the data, a lax.scan of adam steps over its batches.

    Cached so that generators trained with the same optimiser settings in one process share a compilation.
    """
    import optax

    optimizer = optax.adam(learning_rate)

    def step(carry, inputs):
        params, opt_state = carry
        batch, key = inputs
        (loss, _), grads = jax.value_and_grad(negative_elbo, has_aux=True)(params, batch, key)
        updates, opt_state = optimizer.update(grads, opt_state, params)
        return (optax.apply_updates(params, updates), opt_state), loss

    @jax.jit
    def epoch(params, opt_state, data, key):
        order = jax.random.permutation(jax.random.fold_in(key, 0), data.shape[0])[: batches * batch_size]
        batched = data[order].reshape(batches, batch_size, data.shape[1])
        keys = jax.random.split(jax.random.fold_in(key, 1), batches)
        (params, opt_state), losses = jax.lax.scan(step, (params, opt_state), (batched, keys))
        return params, opt_state, losses.mean()

    return optimizer, epoch


_full_data_loss = jax.jit(negative_elbo)


# ----------------------------------------------------------------------------- settings


def _chosen_settings(**chosen: Any) -> dict[str, Any]:
    """Validate the user's choices (one-line InputError naming the option) and fill defaults."""
    settings = dict(DEFAULT_SETTINGS)
    for key, value in chosen.items():
        if value is not None:
            settings[key] = value
    for key in ("latent_dim", "epochs", "batch_size"):
        if not isinstance(settings[key], int) or isinstance(settings[key], bool) or settings[key] < 1:
            raise InputError(f"generator setting {key} = {settings[key]!r} must be a positive integer")
    size = settings["image_size"]
    if not isinstance(size, int) or isinstance(size, bool) or not DIGIT_SIDE <= size <= MAX_IMAGE_SIZE:
        raise InputError(
            f"generator setting image_size = {size!r} must be an integer from {DIGIT_SIDE} to {MAX_IMAGE_SIZE}"
        )
    if not isinstance(settings["seed"], int) or isinstance(settings["seed"], bool) or settings["seed"] < 0:
        raise InputError(f"generator setting seed = {settings['seed']!r} must be a non-negative integer")
    rate = settings["learning_rate"]
    if isinstance(rate, bool) or not isinstance(rate, (int, float)) or not 0 < rate < 1:
        raise InputError(f"generator setting learning_rate = {rate!r} must be a number in (0, 1)")
    settings["learning_rate"] = float(rate)
    widths = settings["hidden_widths"]
    if (not isinstance(widths, (list, tuple)) or not widths
            or any(not isinstance(w, int) or isinstance(w, bool) or w < 1 for w in widths)):
        raise InputError(f"generator setting hidden_widths = {widths!r} must be a non-empty list of positive integers")
    settings["hidden_widths"] = [int(w) for w in widths]
    if settings["batch_size"] > 1797:
        raise InputError(f"generator setting batch_size = {settings['batch_size']} exceeds the 1797 images")
    return settings


def _settings_mismatch(stored: Mapping[str, Any], expected: Mapping[str, Any]) -> str | None:
    """The first key whose stored value differs from the expected one, described; None if all agree."""
    for key, want in expected.items():
        have = stored.get(key)
        if isinstance(want, tuple):
            want = list(want)
        if isinstance(want, float) or isinstance(have, float):
            same = have is not None and want is not None and math.isclose(float(have), float(want), rel_tol=1e-12)
        else:
            same = have == want
        if not same:
            return f"{key} = {have!r} but {want!r} was asked for"
    return None


# ----------------------------------------------------------------------------- saving and loading


def _params_to_npz(params: Params) -> bytes:
    arrays = {
        f"{part}.{index}.{leaf}": np.asarray(layer[leaf], dtype=np.float64)
        for part in ("decoder", "encoder")
        for index, layer in enumerate(params[part])
        for leaf in ("w", "b")
    }
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)
    return buffer.getvalue()


def _params_from_npz(data: bytes, where: Path) -> Params:
    try:
        with np.load(io.BytesIO(data)) as archive:
            arrays = {key: archive[key] for key in archive.files}
    except Exception as error:  # a checksum-valid file that numpy cannot read: still the user's file to fix
        raise InputError(f"generator file {where} cannot be read as .npz ({error})") from None
    params: Params = {"decoder": [], "encoder": []}
    for part in params:
        index = 0
        while f"{part}.{index}.w" in arrays:
            params[part].append(
                {"w": jnp.asarray(arrays[f"{part}.{index}.w"]), "b": jnp.asarray(arrays[f"{part}.{index}.b"])}
            )
            index += 1
    return params


def _write_generator(store: Path, name: str, params: Params, settings: dict, *, replace: bool) -> str:
    from harness.core.files import atomic_write_bytes, atomic_write_json, publish_folder, staging_folder

    data = _params_to_npz(params)
    checksum = _sha256(data)
    with staging_folder(store, name) as staging:
        atomic_write_bytes(staging / PARAMS_FILE, data)
        atomic_write_bytes(staging / CHECKSUM_FILE, f"{checksum}  {PARAMS_FILE}\n".encode())
        atomic_write_json(staging / SETTINGS_FILE, settings)
        publish_folder(staging, store / name, replace=replace)
    return checksum


def load_generator(
    name: str, store: str | Path | None = None, *, expected: Mapping[str, Any] | None = None
) -> TrainedGenerator:
    """Load generator ``name`` from ``store``, verifying its checksum and, if given, ``expected`` settings.

    ``expected`` maps settings.json keys (e.g. ``latent_dim``, ``image_size``, ``output_dim``)
    to the values a scenario needs. Every failure is a one-line :class:`InputError` naming the
    generator and the command that (re)trains it.
    """
    check_name(name)
    store_path = _resolve_store(store)
    folder = store_path / name
    command = train_command(name, expected, store)
    if not (folder / SETTINGS_FILE).is_file() or not (folder / PARAMS_FILE).is_file():
        raise InputError(f"generator {name!r} is not in {store_path}; train it with: {command}")
    try:
        settings = json.loads((folder / SETTINGS_FILE).read_text())
        recorded = (folder / CHECKSUM_FILE).read_text().split()[0]
        if not isinstance(settings, dict):
            raise ValueError(f"{SETTINGS_FILE} is not a JSON object")
    except (OSError, ValueError, IndexError) as error:
        raise InputError(
            f"generator {name!r} in {folder} has an unreadable {SETTINGS_FILE} or {CHECKSUM_FILE} ({error}); "
            f"retrain it with: {command} --force"
        ) from None
    command = train_command(name, _retrain_settings(settings, expected), store)
    data = (folder / PARAMS_FILE).read_bytes()
    checksum = _sha256(data)
    if checksum != recorded:
        raise InputError(
            f"generator {name!r}: {folder / PARAMS_FILE} does not match its SHA-256 checksum (corrupted or edited); "
            f"retrain it with: {command} --force"
        )
    if settings.get("format") != FORMAT_VERSION or settings.get("hidden_activation") != HIDDEN_ACTIVATION:
        raise InputError(
            f"generator {name!r} in {folder} was written by an incompatible version of harness; "
            f"retrain it with: {command} --force"
        )
    if expected:
        mismatch = _settings_mismatch(settings, expected)
        if mismatch:
            raise InputError(
                f"generator {name!r} in {store_path} has {mismatch}; retrain it with: {command} --force "
                "(or train it under another name)"
            )
    params = _params_from_npz(data, folder / PARAMS_FILE)
    decoder = params["decoder"]
    shapes_ok = (
        decoder
        and decoder[0]["w"].shape[0] == settings["latent_dim"]
        and decoder[-1]["w"].shape[1] == settings["output_dim"]
        and [layer["w"].shape[1] for layer in decoder[:-1]] == settings["hidden_widths"]
    )
    if not shapes_ok:
        raise InputError(
            f"generator {name!r}: the layers in {folder / PARAMS_FILE} do not match its {SETTINGS_FILE}; "
            f"retrain it with: {command} --force"
        )
    return TrainedGenerator(name, settings["latent_dim"], settings["output_dim"], params, settings, checksum)


def _retrain_settings(stored: Mapping[str, Any], expected: Mapping[str, Any] | None) -> dict[str, Any]:
    """The stored user choices overridden by what is expected (an expected N decides the image size)."""
    merged = {key: stored[key] for key in CHOSEN_KEYS if key in stored}
    merged.update(expected or {})
    if expected and "output_dim" in expected and "image_size" not in expected:
        merged.pop("image_size", None)
    return merged


def list_generators(store: str | Path | None = None) -> list[tuple[str, dict | None, str]]:
    """Every generator folder in the store: (name, settings or None, "ok" or the reason it fails to load)."""
    store_path = _resolve_store(store)
    if not store_path.is_dir():
        return []
    found = []
    for folder in sorted(path for path in store_path.iterdir() if path.is_dir() and not path.name.startswith(".")):
        try:
            generator = load_generator(folder.name, store_path)
            found.append((folder.name, generator.settings, "ok"))
        except InputError as error:
            settings = None
            try:
                settings = json.loads((folder / SETTINGS_FILE).read_text())
            except (OSError, ValueError):
                pass
            found.append((folder.name, settings, str(error).split(";")[0]))
    return found


# ----------------------------------------------------------------------------- training


def train_generator(
    name: str,
    *,
    latent_dim: int | None = None,
    image_size: int | None = None,
    epochs: int | None = None,
    seed: int | None = None,
    hidden_widths: list[int] | None = None,
    learning_rate: float | None = None,
    batch_size: int | None = None,
    store: str | Path | None = None,
    force: bool = False,
    progress: Callable[[int, int, float], None] | None = None,
) -> TrainedGenerator:
    """Train generator ``name`` (defaults: :data:`DEFAULT_SETTINGS`) or return the cached one.

    If the store already holds ``name`` with the same settings it is loaded, not retrained. A
    stored generator with other settings is an InputError unless ``force`` (then it is replaced).
    ``progress(epoch, epochs, mean_loss_of_the_epoch)`` is called after every epoch.
    """
    check_name(name)
    chosen = _chosen_settings(
        latent_dim=latent_dim, image_size=image_size, epochs=epochs, seed=seed, hidden_widths=hidden_widths,
        learning_rate=learning_rate, batch_size=batch_size,
    )
    store_path = _resolve_store(store)
    if (store_path / name).exists() and not force:
        # Same settings: the cached generator. Other settings: an InputError naming the --force command.
        return load_generator(name, store, expected=chosen)

    import optax

    started = time.perf_counter()
    data_np = load_digit_images(chosen["image_size"])
    output_dim = data_np.shape[1]
    data = jnp.asarray(data_np, dtype=_DTYPE)
    key = jax.random.PRNGKey(chosen["seed"])
    params = init_params(
        jax.random.fold_in(key, 0), latent_dim=chosen["latent_dim"], hidden_widths=chosen["hidden_widths"],
        output_dim=output_dim, mean_image=data_np.mean(axis=0),
    )
    batches = data_np.shape[0] // chosen["batch_size"]  # the remainder changes with every epoch's permutation
    optimizer, run_epoch = _make_epoch(chosen["learning_rate"], chosen["batch_size"], batches)
    opt_state = optimizer.init(params)
    # The full-data loss before and after training is measured with one fixed key, so the two agree on noise.
    evaluation_key = jax.random.fold_in(key, 2)
    initial_loss = float(_full_data_loss(params, data, evaluation_key)[0])
    epoch_losses = []
    train_key = jax.random.fold_in(key, 1)
    for epoch in range(chosen["epochs"]):
        params, opt_state, loss = run_epoch(params, opt_state, data, jax.random.fold_in(train_key, epoch))
        epoch_losses.append(float(loss))
        if not math.isfinite(epoch_losses[-1]):
            raise InputError(
                f"generator {name!r}: training diverged at epoch {epoch + 1} (loss {loss}); "
                f"lower --learning-rate (now {chosen['learning_rate']:g})"
            )
        if progress is not None:
            progress(epoch + 1, chosen["epochs"], epoch_losses[-1])
    final_loss, (final_reconstruction, final_kl) = _full_data_loss(params, data, evaluation_key)

    from sklearn import __version__ as sklearn_version

    settings = {
        "format": FORMAT_VERSION,
        "name": name,
        **chosen,
        "output_dim": output_dim,
        "architecture": ARCHITECTURE,
        "encoder_widths": [output_dim, *reversed(chosen["hidden_widths"]), 2 * chosen["latent_dim"]],
        "decoder_widths": [chosen["latent_dim"], *chosen["hidden_widths"], output_dim],
        "hidden_activation": HIDDEN_ACTIVATION,
        "output_activation": OUTPUT_ACTIVATION,
        "output": "decoder mean pixel intensity in [0, 1], row-major image_size x image_size",
        "latent_prior": "standard normal N(0, I_latent_dim)",
        "optimizer": "optax.adam",
        "data_set": DATA_SET,
        "data_images": int(data_np.shape[0]),
        "upsampling": "none" if chosen["image_size"] == DIGIT_SIDE else "bilinear (jax.image.resize)",
        "loss": "negative ELBO, nats per image: Bernoulli cross-entropy of pixel intensities + KL to N(0, I)",
        "initial_loss": initial_loss,
        "final_loss": float(final_loss),
        "final_reconstruction": float(final_reconstruction),
        "final_kl": float(final_kl),
        "epoch_losses": epoch_losses,
        "training_seconds": round(time.perf_counter() - started, 3),
        "versions": {"jax": jax.__version__, "optax": optax.__version__, "sklearn": sklearn_version},
    }
    checksum = _write_generator(store_path, name, params, settings, replace=True)
    return TrainedGenerator(name, chosen["latent_dim"], output_dim, _params_from_npz(
        (store_path / name / PARAMS_FILE).read_bytes(), store_path / name / PARAMS_FILE), settings, checksum)


def sample_images(generator: TrainedGenerator, key: Array, count: int) -> np.ndarray:
    """``count`` images [count, S, S] from latents c ~ N(0, I): what the data model will feed the network."""
    c = jax.random.normal(key, (count, generator.latent_dim), dtype=_DTYPE)
    side = generator.settings["image_size"]
    return np.asarray(generator_apply(generator.params, c)).reshape(count, side, side)
