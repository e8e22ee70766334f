#!/usr/bin/env python3
"""Reference token ids from llama.cpp's tokenizer, for tests/tokenizer_parity.rs.

Loads each judge model's vocabulary only (`vocab_only=True`, no weights) through the
`llama-cpp-python` package, which builds llama.cpp from source
(`pip install llama-cpp-python`), and records for each model:
  - `plain`:   `tokenize(text, add_bos=False, special=False)` for a fixed list of
               strings: what assize's `encode_plain` must produce;
  - `trusted`: `tokenize(text, add_bos=False, special=True)` for template-like
               strings: what `encode_trusted` must produce;
  - `prompts`: `tokenize(rendered, add_bos=True, special=True)` for each chat fixture
               rendering (run scripts/make-chat-fixtures.py first), except renderings
               whose message contents imitate control tokens, which assize encodes as
               plain text on purpose.
Writes tests/fixtures/tokens/<model-file-stem>.json.

usage: scripts/make-token-fixtures.py [MODELS_DIR]   (default: $ASSIZE_MODELS_DIR, else models/)
"""

import json
import os
import sys
from pathlib import Path

import llama_cpp

ROOT = Path(__file__).resolve().parent.parent
MODELS = [
    "qwen2.5-coder-1.5b-instruct-q4_k_m.gguf",
    "qwen2.5-coder-0.5b-instruct-q5_0.gguf",
    "gemma-3-270m-q4_k_m.gguf",
]

PLAIN = [
    # ASCII words, contractions, case
    "Hello world", "hello", " Hello", "Hello  world", "The quick brown fox jumps over the lazy dog.",
    "I'm sure it's fine", "THEY'RE HERE", "we'll see, you'd know", "don't", "'s", "A", "a",
    # accents and combining marks
    "café", "naïve résumé", "Ünïcödé", "Øresund façade", "São Paulo", "e\u0301", "Straße", "ſ",
    # CJK and other scripts
    "東京", "你好，世界", "こんにちは世界", "한국어 텍스트", "Привет, мир", "مرحبا", "नमस्ते",
    # emoji, including joiners and flags
    "🙂", "👍🏽", "family 👨\u200d👩\u200d👧", "🇫🇷 flag", "x²", "—", "«quoted»", "…",
    # digits and numbers
    "0", "17", "123", "1234", "12345678901234567890", "3.14159", "1,000,000", "-42", "v1.2.3", "2024-05-01",
    # whitespace runs, tabs, newlines
    " ", "  ", "   leading", "trailing   ", "a  b   c    d", "\t", "\ttab", "a\tb", "\t\tdouble tab",
    "\n", "\n\n", "line1\nline2", "line1\r\nline2", "\n\n\nthree", " \n ", "mixed \t\n whitespace",
    "\u00a0no-break space", "ideographic\u3000space", "zero\u200bwidth",
    # code
    "def f(x):\n    return x * 2\n", "fn main() { println!(\"hi\"); }", "if (a && b) { c++; }",
    "<div class=\"x\">y</div>", "SELECT * FROM t WHERE id = 3;", "x = [1, 2, 3]  # list",
    "    indented", "!!!", "...", "#include <stdio.h>",
    # chat-control strings, which plain encoding must keep as text
    "<|im_start|>", "<|im_end|>", "<|endoftext|>", "<start_of_turn>", "<end_of_turn>", "<bos>", "<eos>",
    "<pad>", "<unk>", "<mask>", "<unused0>", "[multimodal]", "<start_of_image>", "<|fim_prefix|>",
    "<tool_call>", "<0x41>", "<|im_start|>assistant", "<|im_start|>user\nhi<|im_end|>\n",
    "<start_of_turn>model\n", "Score: 5<end_of_turn>",
    # a longer paragraph
    "The irrigation schedule for the north beds changes in May: water 20 minutes at 06:00, "
    "skip rainy days (over 5 mm), and log the soil moisture reading (0-100%) after each run.",
]

TRUSTED = [
    "<|im_start|>user\nHello<|im_end|>\n",
    "<|im_start|>assistant\n",
    "<|endoftext|>x",
    "<start_of_turn>user\nHi<end_of_turn>\n<start_of_turn>model\n",
    "<bos>text",
    "a<tool_call>b</tool_call>",
    "<unused0><unused1>",
    "<|im_end|>\n<|im_start|>",
]


def main():
    models_dir = Path(sys.argv[1] if len(sys.argv) > 1 else os.environ.get("ASSIZE_MODELS_DIR", ROOT / "models"))
    out_dir = ROOT / "tests" / "fixtures" / "tokens"
    out_dir.mkdir(parents=True, exist_ok=True)
    for name in MODELS:
        path = models_dir / name
        if not path.exists():
            sys.exit(f"error: model `{path}` is missing\n  fix: run `scripts/fetch-models --all`")
        chat_fixture = ROOT / "tests" / "fixtures" / "chat" / (Path(name).stem + ".json")
        if not chat_fixture.exists():
            sys.exit(f"error: `{chat_fixture.relative_to(ROOT)}` is missing\n  fix: run scripts/make-chat-fixtures.py first")
        llm = llama_cpp.Llama(model_path=str(path), vocab_only=True, verbose=False)

        def tok(text, add_bos, special):
            return llm.tokenize(text.encode("utf-8"), add_bos=add_bos, special=special)

        prompts = []
        for case in json.loads(chat_fixture.read_text(encoding="utf-8"))["cases"]:
            if case["name"] == "injected_control_text":
                continue
            prompts.append({"name": case["name"], "add_generation_prompt": case["add_generation_prompt"],
                            "ids": tok(case["rendered"], True, True)})
        fixture = {
            "model": name,
            "reference": {"name": "llama.cpp tokenizer via llama-cpp-python", "version": llama_cpp.__version__,
                          "settings": "Llama(vocab_only=True); tokenize(text.encode(), add_bos, special)"},
            "n_vocab": llm.n_vocab(),
            "bos": llm.token_bos(),
            "eos": llm.token_eos(),
            "plain": [{"text": t, "ids": tok(t, False, False)} for t in PLAIN],
            "trusted": [{"text": t, "ids": tok(t, False, True)} for t in TRUSTED],
            "prompts": prompts,
        }
        target = out_dir / (Path(name).stem + ".json")
        target.write_text(json.dumps(fixture, ensure_ascii=False, indent=1) + "\n", encoding="utf-8")
        print(f"wrote {target.relative_to(ROOT)} ({len(PLAIN)} plain, {len(TRUSTED)} trusted, "
              f"{len(prompts)} prompts)", file=sys.stderr)


if __name__ == "__main__":
    main()
