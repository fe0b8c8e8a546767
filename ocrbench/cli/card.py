"""``ocrbench card draft FOLDER`` / ``ocrbench card check CARD``: write a card for exported graphs, check one.

``draft`` inspects the ONNX graphs and any ``config.json``, ``generation_config.json``,
``preprocessor_config.json`` and ``tokenizer.json`` beside them, and writes ``FOLDER/card.toml`` with a
comment on every field (``GUESSED`` where no file said). ``check`` loads a card, checks it against the
graphs and runs one warm-up batch: any problem is one line naming the file, exit 2.
"""

from __future__ import annotations

from enum import Enum
from pathlib import Path

import typer

from ocrbench.cli.common import EXIT_OK, EXIT_USAGE, fail
from ocrbench.errors import OcrbenchError


class CardAction(str, Enum):
    draft = "draft"
    check = "check"


def card_cmd(
    action: CardAction = typer.Argument(..., help="draft: write FOLDER/card.toml; check: load CARD and warm it up."),
    path: Path = typer.Argument(..., help="draft: the folder of exported graphs; check: a card.toml or its folder."),
    force: bool = typer.Option(False, "--force", help="draft: replace an existing card.toml."),
    allow_outside_paths: bool = typer.Option(False, "--allow-outside-paths",
                                             help="check: let the card name files outside its own folder."),
    provider: list[str] = typer.Option(["CPUExecutionProvider"], "--provider",
                                       help="check: onnxruntime execution provider for the warm-up (repeat)."),
    allow_cpu_fallback: bool = typer.Option(False, "--allow-cpu-fallback",
                                            help="check: a requested provider that is not installed is a warning "
                                                 "(the check runs on CPU) instead of an error."),
    provider_option: list[str] = typer.Option([], "--provider-option",
                                              help="check: key=value for the first --provider (repeat)."),
) -> None:
    """Draft a recogniser card from an export folder, or check a card including one warm-up batch."""
    if action is CardAction.draft:
        _draft(path, force)
    _check(path, allow_outside_paths, provider, allow_cpu_fallback, provider_option)


def _draft(folder: Path, force: bool) -> None:
    from ocrbench.recognisers.draft import draft_card

    out = folder / "card.toml"
    if out.exists() and not force:
        raise fail(f"{out}: a card is already there (use --force to replace it)", EXIT_USAGE)
    try:
        text = draft_card(folder)
        out.write_text(text, encoding="utf-8")
    except OSError as e:
        raise fail(f"{out}: cannot write: {e.strerror or e}", EXIT_USAGE)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    guessed = sum("GUESSED" in line and not line.startswith("#") for line in text.splitlines())
    typer.echo(f"wrote {out} ({guessed} guessed field(s) marked GUESSED); check it with: ocrbench card check {folder}")
    for line in text.splitlines():
        if line.startswith("# WARNING: "):
            typer.echo(f"warning: {line[len('# WARNING: '):]}", err=True)
    raise typer.Exit(EXIT_OK)


def _check(path: Path, allow_outside: bool, provider: list[str], allow_cpu_fallback: bool,
           provider_option: list[str]) -> None:
    from ocrbench.recognisers.card import load_card
    from ocrbench.recognisers.engine import EngineOptions, parse_provider_options
    from ocrbench.recognisers.registry import open_recogniser

    try:
        options = EngineOptions(providers=tuple(provider), allow_cpu_fallback=allow_cpu_fallback,
                                provider_options=parse_provider_options(provider_option))
        card = load_card(path, allow_outside=allow_outside)
        rec = open_recogniser(card, options=options)
    except OcrbenchError as e:
        raise fail(str(e), EXIT_USAGE)
    for w in rec.provider_warnings:
        typer.echo(f"warning: {w}", err=True)
    typer.echo(f"{card.path}: {card.kind} recogniser '{card.name}' loads and warms up "
               f"(card hash {card.card_hash[:16]}, providers {', '.join(rec.providers)})")
    for role, f in sorted(card.files.items()):
        typer.echo(f"  {role}: {f}")
    if card.seq is not None and card.seq.ctc is not None:
        typer.echo(f"  decoding: joint with the encoder's CTC output '{card.seq.ctc.output}' "
                   f"(weight {card.seq.ctc.weight:g}; --ctc-weight 0 for the decoder alone)")
        if getattr(rec, "drafting", False):
            typer.echo("  greedy decoding is drafted: the CTC best path is checked in one pass of "
                       f"'{card.seq.decoder_full.model.name}', which scores every position (--token-by-token: one call per token)")
        elif card.seq.decoder_full is not None and card.seq.decoder_full.graph.outputs[card.seq.decoder_full.log_probs].rank != 3:
            typer.echo(f"  greedy decoding is token by token ('{card.seq.decoder_full.model.name}' scores the last "
                       "position only, so a draft cannot be checked in one pass)")
    for w in card.warnings:
        typer.echo(f"warning: {w}", err=True)
    raise typer.Exit(EXIT_OK)
