"""The `generator` subcommands: train, list and look at the generators of ``trained_latent`` data.

    harness generator train [--name NAME] [--latent-dim D] [--image-size S] [--hidden-widths W,W]
                            [--epochs E] [--seed S] [--learning-rate R] [--batch-size B]
                            [--store DIR] [--force] [--quiet]
    harness generator list [--store DIR]
    harness generator preview NAME [--store DIR] [--out FILE.png] [--count N] [--seed S]

The store defaults to $HARNESS_GENERATORS, else ~/.cache/harness/generators (see
harness/data/trained_generator.py). Handlers return the exit status; bad input raises InputError.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from harness.core.destinations import check_output_file, check_output_folder
from harness.core.errors import InputError

DEFAULT_NAME = "digits"


def _widths(text: str) -> list[int]:
    try:
        widths = [int(part) for part in text.split(",") if part.strip()]
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated positive integers, got {text!r}") from None
    if not widths or min(widths) < 1:
        raise argparse.ArgumentTypeError(f"expected comma-separated positive integers, got {text!r}")
    return widths


def add_generator_commands(subparsers: argparse._SubParsersAction) -> None:
    """Register `generator train|list|preview`; each sets ``handler`` to a function(namespace) -> int."""
    from harness.data.trained_generator import DEFAULT_SETTINGS as D

    group = subparsers.add_parser(
        "generator",
        help="train and inspect the image generators behind data.kind = \"trained_latent\"",
        description=(
            "A generator is the decoder of a small variational autoencoder trained on scikit-learn's bundled "
            "8x8 digits (optionally upsampled), cached on disk under a name that scenarios refer to."
        ),
    )
    # Nested subparsers inherit the parser class of `group`, so usage errors stay one line.
    commands = group.add_subparsers(dest="generator_command", metavar="ACTION")
    commands.required = True

    store_help = "generator store (default: $HARNESS_GENERATORS or ~/.cache/harness/generators)"
    train = commands.add_parser(
        "train",
        help="train a generator (or reuse the cached one trained with the same settings)",
        description=(
            "Deterministic given its settings; the result goes to STORE/NAME/ "
            "(params.npz, its SHA-256 checksum, settings.json)."
        ),
    )
    train.add_argument("--name", default=DEFAULT_NAME,
                       help=f"name scenarios use in data.generator (default: {DEFAULT_NAME})")
    train.add_argument("--latent-dim", type=int, default=D["latent_dim"], metavar="D",
                       help=f"latent code dimension D (default: {D['latent_dim']})")
    train.add_argument("--image-size", type=int, default=D["image_size"], metavar="S",
                       help="side of the square output image, 8 = the original digits; N = S^2 "
                       f"(default: {D['image_size']})")
    train.add_argument("--hidden-widths", type=_widths, default=D["hidden_widths"], metavar="W,W",
                       help="decoder hidden layer widths, latent side first; the encoder mirrors them "
                       f"(default: {','.join(map(str, D['hidden_widths']))})")
    train.add_argument("--epochs", type=int, default=D["epochs"],
                       help=f"passes over the 1797 images (default: {D['epochs']})")
    train.add_argument("--seed", type=int, default=D["seed"],
                       help=f"initialisation and shuffling seed (default: {D['seed']})")
    train.add_argument("--learning-rate", type=float, default=D["learning_rate"], metavar="R",
                       help=f"adam step size (default: {D['learning_rate']:g})")
    train.add_argument("--batch-size", type=int, default=D["batch_size"], metavar="B",
                       help=f"images per adam step (default: {D['batch_size']})")
    train.add_argument("--store", type=Path, default=None, help=store_help)
    train.add_argument("--force", action="store_true", help="retrain and replace a stored generator of this name")
    train.add_argument("--quiet", action="store_true", help="no progress line")
    train.set_defaults(handler=_cmd_train)

    listing = commands.add_parser("list", help="list the stored generators with their settings and final loss")
    listing.add_argument("--store", type=Path, default=None, help=store_help)
    listing.set_defaults(handler=_cmd_list)

    preview = commands.add_parser("preview", help="save a PNG grid of images decoded from random latent codes")
    preview.add_argument("name", help="generator name")
    preview.add_argument("--store", type=Path, default=None, help=store_help)
    preview.add_argument("--out", type=Path, default=None,
                         help="PNG file (default: NAME-preview.png in the current folder)")
    preview.add_argument("--count", type=int, default=64,
                         help="number of images, laid out in a square-ish grid (default: 64)")
    preview.add_argument("--seed", type=int, default=0, help="seed of the latent codes (default: 0)")
    preview.set_defaults(handler=_cmd_preview)


def _cmd_train(args: argparse.Namespace) -> int:
    from harness.data.trained_generator import default_store, train_generator
    from harness.runner.progress import Progress

    store = args.store if args.store is not None else default_store()
    if args.force or not (Path(store) / args.name).exists():  # it will write there
        check_output_folder(store, "--store")
    trained = False
    with Progress("training", args.epochs, enabled=not args.quiet) as bar:

        def report(epoch: int, epochs: int, loss: float) -> None:
            nonlocal trained
            trained = True
            bar.update(epoch, f"epoch {epoch}/{epochs}, -ELBO {loss:.2f}")

        generator = train_generator(
            args.name, latent_dim=args.latent_dim, image_size=args.image_size, hidden_widths=args.hidden_widths,
            epochs=args.epochs, seed=args.seed, learning_rate=args.learning_rate, batch_size=args.batch_size,
            store=store, force=args.force, progress=report,
        )
    s = generator.settings
    how = (f"trained in {s['training_seconds']:.1f} s" if trained
           else "already trained with these settings (use --force to retrain)")
    sys.stdout.write(
        f"generator {generator.name!r} -> {Path(store) / generator.name}: {how}\n"
        f"  D = {generator.latent_dim}, N = {generator.output_dim} ({s['image_size']}x{s['image_size']}), "
        f"{s['epochs']} epochs, -ELBO {s['initial_loss']:.2f} -> {s['final_loss']:.2f} nats/image "
        f"(reconstruction {s['final_reconstruction']:.2f}, KL {s['final_kl']:.2f}); sha256 {generator.checksum[:12]}\n"
    )
    return 0


def _cmd_list(args: argparse.Namespace) -> int:
    from harness.data.trained_generator import default_store, list_generators

    store = args.store if args.store is not None else default_store()
    found = list_generators(store)
    if not found:
        sys.stdout.write(f"no generators in {store} (train one with: harness generator train)\n")
        return 0
    sys.stdout.write(f"generators in {store}:\n")
    header = f"  {'name':<20}{'D':>4}{'S':>4}{'N':>6}  {'widths':<12}{'epochs':>7}{'seed':>6}{'-ELBO':>9}  status\n"
    sys.stdout.write(header)
    for name, settings, status in found:
        s = settings or {}
        field = {key: (format(s[key], ".2f" if key == "final_loss" else "") if key in s else "?")
                 for key in ("latent_dim", "image_size", "output_dim", "epochs", "seed", "final_loss")}
        widths = ",".join(map(str, s["hidden_widths"])) if "hidden_widths" in s else "?"
        sys.stdout.write(
            f"  {name:<20}{field['latent_dim']:>4}{field['image_size']:>4}{field['output_dim']:>6}  {widths:<12}"
            f"{field['epochs']:>7}{field['seed']:>6}{field['final_loss']:>9}  {status}\n"
        )
    return 0


def _cmd_preview(args: argparse.Namespace) -> int:
    if args.count < 1:
        raise InputError(f"--count {args.count} must be a positive integer")
    from harness.data.trained_generator import check_name

    out = args.out if args.out is not None else Path(f"{check_name(args.name)}-preview.png")
    check_output_file(out, "--out")
    import io
    import math

    import jax
    from matplotlib.figure import Figure  # no pyplot: no backend is chosen, the PNG writer is used directly

    from harness.core.files import atomic_write_bytes
    from harness.data.trained_generator import load_generator, sample_images

    generator = load_generator(args.name, args.store)
    images = sample_images(generator, jax.random.PRNGKey(args.seed), args.count)
    columns = math.ceil(math.sqrt(args.count))
    rows = math.ceil(args.count / columns)
    figure = Figure(figsize=(columns * 0.8, rows * 0.8))
    axes = figure.subplots(rows, columns, squeeze=False)
    for index, ax in enumerate(axes.ravel()):
        ax.axis("off")
        if index < args.count:
            ax.imshow(images[index], cmap="gray_r", vmin=0.0, vmax=1.0)
    figure.subplots_adjust(left=0.02, right=0.98, bottom=0.02, top=0.92, wspace=0.05, hspace=0.05)
    figure.suptitle(f"{generator.name}: G(c), c ~ N(0, I_{generator.latent_dim})", fontsize=8)
    buffer = io.BytesIO()
    figure.savefig(buffer, format="png", dpi=100)
    atomic_write_bytes(out, buffer.getvalue())
    sys.stdout.write(f"{args.count} decoded images -> {out}\n")
    return 0
