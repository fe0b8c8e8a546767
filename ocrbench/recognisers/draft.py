"""``card draft``: write a card for a folder of exported ONNX graphs, saying what was guessed.

Two layouts are recognised:

* the standard encoder-decoder export of the Transformers ecosystem's ONNX exporter
  (``encoder_model.onnx``; ``decoder_model.onnx`` + ``decoder_with_past_model.onnx`` and/or
  ``decoder_model_merged.onnx`` with a ``use_cache_branch`` input; ``tokenizer.json``,
  ``config.json``, ``generation_config.json``, ``preprocessor_config.json`` beside them);
* a CTC graph: one ``.onnx`` file with a rank-4 image input and a rank-3 score output, with a
  symbol file beside it (one JSON string per line, or one symbol per line).

Every field the draft could not read from a file carries a comment saying it was guessed.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

from ocrbench.errors import CardError
from ocrbench.recognisers.graphs import GraphInfo, read_graph

#: Pillow's resampling codes as the image processors store them (PIL.Image.Resampling values).
PIL_FILTERS = {0: "nearest", 1: "lanczos", 2: "bilinear", 3: "bicubic", 4: "box", 5: "hamming"}
#: generate() settings ocrbench's decoders do not apply (transformers GenerationConfig field names), with
#: the value at which they do nothing.
UNAPPLIED = {"forced_eos_token_id": None, "forced_bos_token_id": None, "no_repeat_ngram_size": 0,
             "encoder_no_repeat_ngram_size": 0, "repetition_penalty": 1.0, "length_penalty": 1.0,
             "min_length": 0, "min_new_tokens": None, "bad_words_ids": None, "suppress_tokens": None,
             "begin_suppress_tokens": None, "diversity_penalty": 0.0, "exponential_decay_length_penalty": None,
             "do_sample": False, "num_beam_groups": 1, "early_stopping": False}


def _json(path: Path) -> dict:
    if not path.is_file():
        return {}
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise CardError(path, f"not a readable JSON file ({type(e).__name__})") from e
    return data if isinstance(data, dict) else {}


def generation_warnings(folder: Path) -> list[str]:
    """generate() settings in ``generation_config.json`` that ocrbench does not apply (one line each)."""
    cfg = _json(folder / "generation_config.json")
    out = []
    for key, neutral in UNAPPLIED.items():
        if key in cfg and cfg[key] is not None and cfg[key] != neutral:
            out.append(f"generation_config.json sets {key} = {json.dumps(cfg[key])}, which ocrbench does not apply")
    if isinstance(cfg.get("eos_token_id"), list) and len(cfg["eos_token_id"]) > 1:
        out.append(f"generation_config.json lists several end tokens {cfg['eos_token_id']}; ocrbench stops at "
                   "the first one only")
    return out


#: The crop clean-up a card can turn on, drafted as comments: no export says how its lines were cut, so
#: the draft leaves them off (the card's defaults) and says when each one helps.
CLEAN_UP = ["# Crop clean-up before resizing, off unless set (models/README.md, the [input] table):",
            "# flatten = true             # photographed or unevenly lit pages: divide the paper's shading out",
            "# trim = true                # loose crops (ruled rows, wide leading, another segmenter's boxes)",
            "# remove_rules = true        # ruled tables whose rules would be read as l or |"]


def _q(v) -> str:
    return json.dumps(v, ensure_ascii=False)


def _names(names) -> str:
    return "[" + ", ".join(_q(n) for n in names) + "]"


def draft_card(folder: Path | str) -> str:
    """The text of a card for the models in ``folder``. Raises CardError when no known layout is found."""
    folder = Path(folder)
    if not folder.is_dir():
        raise CardError(folder, "not a folder")
    if (folder / "encoder_model.onnx").is_file():
        return _draft_seq(folder)
    graphs = sorted(folder.glob("*.onnx"))
    if len(graphs) == 1:
        return _draft_ctc(folder, graphs[0])
    raise CardError(folder, "no known export layout: expected encoder_model.onnx with decoder_model*.onnx "
                            f"(encoder-decoder), or one .onnx file (CTC); found {len(graphs)} .onnx files")


# --------------------------------------------------------------------------- encoder-decoder


def _input_from_processor(folder: Path, enc: GraphInfo, pixel: str) -> list[str]:
    pp = _json(folder / "preprocessor_config.json")
    shape = enc.inputs[pixel].shape or ()
    lines = ["[input]"]
    size = pp.get("size") if pp.get("do_resize", True) else None
    h = w = None
    if isinstance(size, dict) and "height" in size and "width" in size:
        h, w = int(size["height"]), int(size["width"])
        lines += [f"height = {h}                 # preprocessor_config.json size.height",
                  f"width = {w}                 # preprocessor_config.json size.width",
                  'resize = "stretch"          # the image processor resizes to height x width, ignoring the aspect']
    else:
        h = shape[2] if len(shape) == 4 and isinstance(shape[2], int) and shape[2] > 0 else 32
        lines += [f"height = {h}                 # GUESSED: no fixed size in preprocessor_config.json"]
    filt = PIL_FILTERS.get(pp.get("resample"), None)
    lines.append(f'filter = "{filt or "bilinear"}"' + ("        # preprocessor_config.json resample"
                                                        if filt else "        # GUESSED: no resample given"))
    channels = len(pp["image_mean"]) if isinstance(pp.get("image_mean"), list) else 3
    lines += [f"channels = {channels}                # grey lines are replicated into every channel",
              'layout = "NCHW"             # pixel_values is (batch, channels, height, width)',
              "invert = false              # the processor feeds pixels as they are (paper light)"]
    scale = pp.get("rescale_factor", 1 / 255) if pp.get("do_rescale", True) else 1.0
    lines.append(f"scale = {scale!r}   # preprocessor_config.json rescale_factor")
    if pp.get("do_normalize", False) and "image_mean" in pp and "image_std" in pp:
        lines += [f"mean = {_names(pp['image_mean']).replace(chr(34), '')}    # preprocessor_config.json image_mean",
                  f"std = {_names(pp['image_std']).replace(chr(34), '')}     # preprocessor_config.json image_std"]
    return lines + CLEAN_UP


def _special_ids(folder: Path) -> list[str]:
    gen, cfg = _json(folder / "generation_config.json"), _json(folder / "config.json")
    dec_cfg = cfg.get("decoder", {}) if isinstance(cfg.get("decoder"), dict) else {}

    def pick(key: str):
        for src, name in ((gen, "generation_config.json"), (cfg, "config.json"), (dec_cfg, "config.json decoder")):
            v = src.get(key)
            if isinstance(v, list) and v:
                v = v[0]
            if isinstance(v, int):
                return v, name
        return None, None

    out = []
    for field, key in (("bos_index", "decoder_start_token_id"), ("eos_index", "eos_token_id"),
                       ("pad_index", "pad_token_id")):
        v, src = pick(key)
        if v is None and field == "bos_index":
            v, src = pick("bos_token_id")
        if v is None:
            if field == "pad_index":
                continue
            raise CardError(folder, f"card draft: no {key} in generation_config.json or config.json")
        out.append(f"{field} = {v}" + " " * max(1, 22 - len(f"{field} = {v}")) + f"# {src} {key}")
    if gen.get("max_new_tokens"):
        out.append(f"max_tokens = {int(gen['max_new_tokens'])}         # generation_config.json max_new_tokens")
    elif gen.get("max_length") or cfg.get("max_length"):
        n = int(gen.get("max_length") or cfg.get("max_length")) - 1
        out.append(f"max_tokens = {n}              # generation_config.json max_length - 1 (the start token)")
    else:
        out.append("max_tokens = 19              # generate()'s default max_length 20, less the start token")
    return out


def _cache_names(g: GraphInfo) -> tuple[list[str], list[str], list[str], list[str]]:
    """(self past inputs, their present outputs, cross past inputs, their present outputs), by position."""
    past = sorted((n for n in g.inputs if n.startswith("past_key_values.")), key=_natural)
    self_past = [n for n in past if ".encoder." not in n]
    cross_past = [n for n in past if ".encoder." in n]
    present = lambda names: [n.replace("past_key_values.", "present.", 1) for n in names]  # noqa: E731
    return self_past, present(self_past), cross_past, present(cross_past)


def _natural(name: str):
    return [int(t) if t.isdigit() else t for t in re.split(r"(\d+)", name)]


def _check_feedable(g: GraphInfo, known: set[str]) -> None:
    extra = sorted(set(g.inputs) - known)
    if extra:
        raise CardError(g.path, f"card draft: inputs {', '.join(extra)} are not ones ocrbench can feed "
                                "(it feeds input_ids, encoder_hidden_states, past_key_values.*, use_cache_branch)")


def _draft_seq(folder: Path) -> str:
    enc = read_graph(folder, "encoder", folder / "encoder_model.onnx")
    pixel = next(iter(enc.inputs))
    hidden = next(iter(enc.outputs))
    if not (folder / "tokenizer.json").is_file():
        raise CardError(folder, "card draft: no tokenizer.json beside the encoder-decoder graphs")
    lines = [f"# Drafted by 'ocrbench card draft' from the encoder-decoder export in {folder.name}/.",
             "# Every field names where it was read from; GUESSED marks what no file said.",
             f"name = {_q(re.sub(r'[^0-9A-Za-z_.+() -]', '-', folder.name).lstrip('.-_ ') or 'recogniser')}",
             'kind = "seq"', ""]
    lines += _input_from_processor(folder, enc, pixel)
    lines += ["", "[seq]", 'tokenizer = "tokenizer.json"   # decoded over whole sequences (byte-level BPE included)']
    lines += _special_ids(folder)
    for w in generation_warnings(folder):
        lines.append(f"# WARNING: {w}")
    lines += ["", "[seq.encoder]", 'model = "encoder_model.onnx"', f"input = {_q(pixel)}",
              f"outputs = [{_q(hidden)}]", 'layout = "BTD"              # (batch, frames, hidden)']
    split = (folder / "decoder_model.onnx").is_file() and (folder / "decoder_with_past_model.onnx").is_file()
    if split:
        lines += _draft_split(folder, hidden)
    elif (folder / "decoder_model_merged.onnx").is_file():
        lines += _draft_merged(folder, hidden)
    else:
        raise CardError(folder, "card draft: found encoder_model.onnx but neither decoder_model.onnx with "
                                "decoder_with_past_model.onnx nor decoder_model_merged.onnx")
    return "\n".join(lines) + "\n"


def _draft_split(folder: Path, hidden: str) -> list[str]:
    first = read_graph(folder, "decoder_first", folder / "decoder_model.onnx")
    step = read_graph(folder, "decoder_step", folder / "decoder_with_past_model.onnx")
    sp, spr, cp, cpr = _cache_names(step)
    _check_feedable(first, {"input_ids", "encoder_hidden_states"})
    _check_feedable(step, {"input_ids", "encoder_hidden_states", *sp, *cp})
    fpr = [n for n in first.outputs if n.startswith("present.")]
    first_self = [n for n in sorted(fpr, key=_natural) if ".encoder." not in n]
    first_cross = [n for n in sorted(fpr, key=_natural) if ".encoder." in n]
    mem = '["encoder_hidden_states"]' if "encoder_hidden_states" in step.inputs else "[]"
    return ["", "# The first step runs decoder_model.onnx (no cache in); its present.* outputs start the cache"
                + (" and the cross-attention keys/values, fed unchanged afterwards" if cp else "") + ".",
            "[seq.decoder_first]", 'model = "decoder_model.onnx"', 'tokens = "input_ids"',
            'memory = ["encoder_hidden_states"]', 'logits = "logits"             # (batch, positions, vocabulary)',
            f"present = {_names(first_self)}", f"static_present = {_names(first_cross)}",
            "", "[seq.decoder_step]", 'model = "decoder_with_past_model.onnx"', 'tokens = "input_ids"',
            f"memory = {mem}", f"past = {_names(sp)}", f"present = {_names(spr)}", f"static_past = {_names(cp)}",
            'logits = "logits"', 'cache_layout = "BHTD"        # (batch, heads, positions, head size)',
            "", "# Without the cache (--no-cache): the whole prefix through decoder_model.onnx each step.",
            "[seq.decoder_full]", 'model = "decoder_model.onnx"', 'tokens = "input_ids"',
            'memory = ["encoder_hidden_states"]', 'logits = "logits"']


def _draft_merged(folder: Path, hidden: str) -> list[str]:
    g = read_graph(folder, "decoder_step", folder / "decoder_model_merged.onnx")
    sp, spr, cp, cpr = _cache_names(g)
    _check_feedable(g, {"input_ids", "encoder_hidden_states", "use_cache_branch", *sp, *cp})
    return ["", "# One merged graph: use_cache_branch is false at the first step (its present.* outputs start the",
            "# cache), true afterwards.", "[seq.decoder_step]", 'model = "decoder_model_merged.onnx"',
            'tokens = "input_ids"', 'memory = ["encoder_hidden_states"]', f"past = {_names(sp)}",
            f"present = {_names(spr)}", f"static_past = {_names(cp)}", f"static_present = {_names(cpr)}",
            'use_cache_branch = "use_cache_branch"', 'logits = "logits"',
            'cache_layout = "BHTD"        # (batch, heads, positions, head size)']


# --------------------------------------------------------------------------- CTC


def _read_symbol_lines(path: Path) -> list[str] | None:
    try:
        raw = path.read_text(encoding="utf-8-sig").split("\n")
    except (OSError, UnicodeDecodeError):
        return None
    if raw and raw[-1] == "":
        raw.pop()
    try:
        out = [json.loads(line) for line in raw]
        return out if all(isinstance(s, str) for s in out) else None
    except json.JSONDecodeError:
        return [line.rstrip("\r") for line in raw]


def _ctc_alphabet(folder: Path, classes: int | None) -> tuple[str, int, str]:
    """(alphabet file name, blank index, comment); writes ``alphabet.jsonl`` when the symbols need converting."""
    for cand in sorted(folder.glob("*.txt")) + sorted(folder.glob("*.jsonl")):
        syms = _read_symbol_lines(cand)
        if not syms:
            continue
        if classes is None or len(syms) == classes:
            blank = next((i for i, s in enumerate(syms) if s.lower() in ("<blank>", "<b>", "[blank]", "blank")), 0)
            if all(_is_json_line(line) for line in cand.read_text(encoding="utf-8-sig").splitlines()):
                return cand.name, blank, f"{cand.name}: {len(syms)} entries; blank GUESSED at {blank}"
            out = folder / "alphabet.jsonl"
            out.write_text("".join(json.dumps(s, ensure_ascii=False) + "\n" for s in syms), encoding="utf-8")
            return out.name, blank, f"converted from {cand.name}; blank GUESSED at {blank}"
        if len(syms) == classes - 1:
            out = folder / "alphabet.jsonl"
            out.write_text("".join(json.dumps(s, ensure_ascii=False) + "\n" for s in ["<blank>", *syms]),
                           encoding="utf-8")
            return out.name, 0, f"{cand.name} with the blank GUESSED as a new first class"
    raise CardError(folder, f"card draft: no symbol file with {classes} entries (or one fewer) beside the model")


def _is_json_line(line: str) -> bool:
    try:
        return isinstance(json.loads(line), str)
    except json.JSONDecodeError:
        return False


#: Operators that move or rename values without changing them: looked through to find what made the scores.
PASS_THROUGH = {"Identity", "Transpose", "Reshape", "Squeeze", "Unsqueeze", "Cast", "Flatten"}


def _producer_op(graph, name: str) -> str:
    """The operator that computed output ``name``, looking through layout-only operators."""
    made = {o: n for n in graph.node for o in n.output}
    for _ in range(len(graph.node) + 1):
        node = made.get(name)
        if node is None:
            return ""
        if node.op_type not in PASS_THROUGH or not node.input:
            return node.op_type
        name = node.input[0]
    return ""


def _draft_ctc(folder: Path, model: Path) -> str:
    import onnx

    g = read_graph(folder, "ctc", model)
    imgs = [t for t in g.inputs.values() if t.rank == 4]
    outs = [t for t in g.outputs.values() if t.rank == 3]
    if len(g.inputs) != 1 or not imgs or not outs:
        raise CardError(model, "card draft: expected one rank-4 image input and a rank-3 score output")
    img, out = imgs[0], outs[0]
    nhwc = img.static(3) in (1, 3) and img.static(1) not in (1, 3)
    layout = "NHWC" if nhwc else "NCHW"
    c = img.static(3 if nhwc else 1) or 1
    h = img.static(1 if nhwc else 2)
    w = img.static(2 if nhwc else 3)
    tbc = isinstance(out.shape[1], str) and "batch" in out.shape[1].lower()
    classes = out.static(2)
    op = _producer_op(onnx.load(str(model), load_external_data=False).graph, out.name)
    kind = {"Softmax": "probs", "LogSoftmax": "log_probs"}.get(op, "logits")
    alphabet, blank, note = _ctc_alphabet(folder, classes)
    lines = [f"# Drafted by 'ocrbench card draft' from {model.name}. GUESSED marks what no file said.",
             f"name = {_q(re.sub(r'[^0-9A-Za-z_.+() -]', '-', folder.name).lstrip('.-_ ') or 'recogniser')}",
             'kind = "ctc"', "", "[input]",
             f"height = {h or 32}" + ("                 # the graph's fixed height" if h else "   # GUESSED"),
             f"channels = {c}" + ("               # the graph's channel axis" if img.static(3 if nhwc else 1) else ""),
             f'layout = "{layout}"' + ("           # GUESSED from where the graph's channel axis sits")]
    if w:
        lines.append(f"width = {w}                  # the graph's fixed width")
    lines += ["invert = true                # GUESSED: ink as high values", *CLEAN_UP, "",
              "[ctc]", f"model = {_q(model.name)}", f"input = {_q(img.name)}", f"output = {_q(out.name)}",
              f'layout = "{"TBC" if tbc else "BTC"}"' + "               # GUESSED from the output's axis names",
              f'output_kind = "{kind}"' + f"       # the graph ends in {op or 'no node'} (checked at warm-up)",
              f"blank_index = {blank}", f"alphabet = {_q(alphabet)}        # {note}",
              "# frames_per_pixel unset: frames are shared in proportion to the padded width (GUESSED)"]
    return "\n".join(lines) + "\n"
