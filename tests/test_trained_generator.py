"""The trained generator of ``trained_latent`` data: training, the on-disk cache, loading, applying."""

from __future__ import annotations

import json
import shutil

import jax
import jax.numpy as jnp
import numpy as np
import pytest

from harness.cli.main import main
from harness.core.errors import InputError
from harness.data.trained_generator import (
    CHECKSUM_FILE,
    PARAMS_FILE,
    SETTINGS_FILE,
    default_store,
    generator_apply,
    load_digit_images,
    load_generator,
    sample_images,
    train_generator,
)

# Small enough to train in a few seconds; large enough for the loss to fall clearly.
TINY = {"latent_dim": 2, "image_size": 8, "hidden_widths": [16], "epochs": 6, "seed": 3, "batch_size": 128}


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    store = tmp_path_factory.mktemp("generators")
    epochs_seen = []
    generator = train_generator("tiny", **TINY, store=store, progress=lambda e, n, loss: epochs_seen.append((e, loss)))
    return store, generator, epochs_seen


def test_training_reduces_the_loss_and_reports_every_epoch(trained):
    _, generator, epochs_seen = trained
    s = generator.settings
    assert [epoch for epoch, _ in epochs_seen] == list(range(1, TINY["epochs"] + 1))
    # The same data, the same evaluation noise key, before and after: training must lower -ELBO.
    assert s["final_loss"] < s["initial_loss"] - 2.0
    assert s["epoch_losses"][-1] < s["epoch_losses"][0]
    assert s["final_loss"] == pytest.approx(s["final_reconstruction"] + s["final_kl"], rel=1e-12)


def test_the_folder_holds_parameters_checksum_and_settings(trained):
    store, generator, _ = trained
    folder = store / "tiny"
    assert sorted(path.name for path in folder.iterdir()) == sorted([PARAMS_FILE, CHECKSUM_FILE, SETTINGS_FILE])
    assert not [path for path in store.iterdir() if path.name.startswith(".")]  # no staging folder left behind
    settings = json.loads((folder / SETTINGS_FILE).read_text())
    for key, value in TINY.items():
        assert settings[key] == value
    for key in ("architecture", "hidden_activation", "output_activation", "learning_rate", "data_set", "final_loss"):
        assert key in settings
    assert settings["output_dim"] == 64
    assert (folder / CHECKSUM_FILE).read_text().split() == [generator.checksum, PARAMS_FILE]


def test_a_second_call_with_the_same_settings_reuses_the_cache(trained):
    store, generator, _ = trained
    before = (store / "tiny" / PARAMS_FILE).stat().st_mtime_ns
    calls = []
    again = train_generator("tiny", **TINY, store=store, progress=lambda *a: calls.append(a))
    assert calls == []
    assert again.checksum == generator.checksum
    assert (store / "tiny" / PARAMS_FILE).stat().st_mtime_ns == before


def test_other_settings_under_a_stored_name_are_refused_with_the_retrain_command(trained):
    store, _, _ = trained
    with pytest.raises(InputError) as error:
        train_generator("tiny", **{**TINY, "latent_dim": 3}, store=store)
    message = str(error.value)
    assert "\n" not in message and "'tiny'" in message and "latent_dim = 2" in message
    assert "harness generator train --name tiny --latent-dim 3" in message and "--force" in message
    with pytest.raises(InputError, match="image_size = 8 but 16"):
        load_generator("tiny", store, expected={"image_size": 16})
    with pytest.raises(InputError) as error:  # a scenario asking for N = 256 inputs: retrain at 16x16, rest kept
        load_generator("tiny", store, expected={"output_dim": 256})
    assert "output_dim = 64 but 256" in str(error.value)
    assert "--latent-dim 2 --hidden-widths 16 --epochs 6 --seed 3 --batch-size 128" in str(error.value)
    assert "--image-size" not in str(error.value)
    assert load_generator("tiny", store, expected={"latent_dim": 2, "output_dim": 64}).latent_dim == 2


def test_training_is_deterministic_given_its_settings(trained, tmp_path):
    _, generator, _ = trained
    again = train_generator("tiny", **TINY, store=tmp_path)
    assert again.checksum == generator.checksum
    for first, second in zip(jax.tree.leaves(generator.params), jax.tree.leaves(again.params), strict=True):
        np.testing.assert_array_equal(np.asarray(first), np.asarray(second))
    other_seed = train_generator("tiny_other_seed", **{**TINY, "seed": TINY["seed"] + 1}, store=tmp_path)
    assert other_seed.checksum != generator.checksum


def test_a_corrupted_parameter_file_is_detected(trained, tmp_path):
    store, _, _ = trained
    shutil.copytree(store / "tiny", tmp_path / "tiny")
    path = tmp_path / "tiny" / PARAMS_FILE
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01  # one bit inside an array: numpy would still read it
    path.write_bytes(bytes(data))
    with pytest.raises(InputError) as error:
        load_generator("tiny", tmp_path)
    message = str(error.value)
    assert "\n" not in message and "'tiny'" in message and "checksum" in message
    assert "harness generator train --name tiny" in message


def test_a_missing_generator_is_a_one_line_error_with_the_command(tmp_path):
    with pytest.raises(InputError) as error:
        load_generator("absent", tmp_path, expected={"latent_dim": 4, "output_dim": 256})
    message = str(error.value)
    assert "\n" not in message and "'absent'" in message and str(tmp_path) in message
    # The scenario knew N = 256, so the command asks for 16x16 images.
    assert f"harness generator train --name absent --latent-dim 4 --store {tmp_path}" in message
    assert message.endswith(f"--store {tmp_path}") and "--image-size" not in message  # 16 is the default
    with pytest.raises(InputError, match="generator name"):
        load_generator("../escape", tmp_path)


def test_bad_settings_are_one_line_errors_naming_the_setting(tmp_path):
    with pytest.raises(InputError, match="image_size = 5"):
        train_generator("x", image_size=5, store=tmp_path)
    with pytest.raises(InputError, match="hidden_widths"):
        train_generator("x", hidden_widths=[0], store=tmp_path)
    with pytest.raises(InputError, match="learning_rate"):
        train_generator("x", learning_rate=-1.0, store=tmp_path)
    assert not (tmp_path / "x").exists()


def test_generator_apply_maps_latents_to_finite_images_in_the_unit_interval(trained):
    store, _, _ = trained
    generator = load_generator("tiny", store)
    c = jax.random.normal(jax.random.PRNGKey(0), (32, generator.latent_dim), dtype=jnp.float64)
    images = jax.jit(generator_apply)(generator.params, c)
    assert images.shape == (32, generator.output_dim) and images.dtype == jnp.float64
    assert bool(jnp.all(jnp.isfinite(images))) and bool(jnp.all((images >= 0) & (images <= 1)))
    assert float(images.std(axis=0).mean()) > 1e-3  # the output depends on the latent code
    grid = sample_images(generator, jax.random.PRNGKey(0), 5)
    assert grid.shape == (5, 8, 8)


def test_the_training_images_are_sklearn_digits_scaled_to_the_unit_interval():
    from sklearn.datasets import load_digits  # the bundled data set itself (scikit-learn)

    original = load_digits().data / 16.0
    np.testing.assert_array_equal(load_digit_images(8), original)
    upsampled = load_digit_images(16)
    assert upsampled.shape == (1797, 256) and upsampled.min() >= 0.0 and upsampled.max() <= 1.0
    # Bilinear upsampling by 2 averages neighbouring pixels: the mean brightness barely moves.
    assert upsampled.mean() == pytest.approx(original.mean(), rel=0.05)


def test_the_default_store_follows_the_environment(monkeypatch, tmp_path):
    monkeypatch.setenv("HARNESS_GENERATORS", str(tmp_path / "here"))
    assert default_store() == tmp_path / "here"
    monkeypatch.delenv("HARNESS_GENERATORS")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    assert default_store() == tmp_path / "cache" / "harness" / "generators"


def test_command_line_train_list_and_preview(trained, tmp_path, capsys):
    store, generator, _ = trained
    arguments = ["--latent-dim", "2", "--image-size", "8", "--hidden-widths", "16", "--epochs", "6",
                 "--seed", "3", "--batch-size", "128"]
    assert main(["generator", "train", "--name", "tiny", *arguments, "--store", str(store), "--quiet"]) == 0
    assert "already trained" in capsys.readouterr().out
    assert main(["generator", "list", "--store", str(store)]) == 0
    listing = capsys.readouterr().out
    assert "tiny" in listing and "ok" in listing
    out = tmp_path / "grid.png"
    assert main(["generator", "preview", "tiny", "--store", str(store), "--out", str(out), "--count", "9"]) == 0
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert main(["generator", "train", "--name", "tiny", "--latent-dim", "5", "--store", str(store)]) == 2
    assert "--force" in capsys.readouterr().err
