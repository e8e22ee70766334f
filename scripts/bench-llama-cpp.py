#!/usr/bin/env python3
"""Prompt and generation speed of llama.cpp on this machine, for comparison with
`assize model bench` (same prompt length, thread count and kind of token ids).

llama.cpp (Gerganov et al.) is the C++ CPU engine for GGUF files; this script reaches it
through the `llama-cpp-python` package, built from source by pip. Build it for the
instruction set you compare with, each build in its own virtual environment:
    # this machine's own instructions
    CMAKE_ARGS="-DGGML_NATIVE=ON" pip install llama-cpp-python
    # AVX2 only (to compare with `ASSIZE_KERNELS=avx2` on an AVX-512 machine)
    CMAKE_ARGS="-DGGML_NATIVE=OFF -DGGML_AVX=ON -DGGML_AVX2=ON -DGGML_FMA=ON \
      -DGGML_F16C=ON -DGGML_AVX512=OFF -DGGML_AVX512_VNNI=OFF -DGGML_AVX512_VBMI=OFF \
      -DGGML_AVX512_BF16=OFF -DGGML_AVX_VNNI=OFF -DGGML_AMX_TILE=OFF -DGGML_AMX_INT8=OFF \
      -DGGML_AMX_BF16=OFF" pip install --no-binary llama-cpp-python llama-cpp-python
On processors that report AMX inside a virtual machine, ggml's AMX kernels may crash
(seen here); leave them out as above. The JSON line records the build's instruction
sets as llama.cpp reports them (`system_info`).
Each figure is the best of `--repeats` runs. Nothing here is a test.

usage: scripts/bench-llama-cpp.py MODEL.gguf [--prompt-tokens 256] [--gen-tokens 64]
                                  [--threads 2] [--repeats 3]
"""

import argparse
import json
import time

import llama_cpp


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("model")
    ap.add_argument("--prompt-tokens", type=int, default=256)
    ap.add_argument("--gen-tokens", type=int, default=64)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeats", type=int, default=3)
    args = ap.parse_args()

    llm = llama_cpp.Llama(
        model_path=args.model,
        n_ctx=args.prompt_tokens + args.gen_tokens + 8,
        n_batch=512,
        n_threads=args.threads,
        n_threads_batch=args.threads,
        verbose=False,
    )
    vocab = llm.n_vocab()
    # Ordinary ids past the special and byte tokens, as `assize model bench` uses.
    prompt = [1000 + (i * 7919) % (vocab - 1000) for i in range(args.prompt_tokens)]
    best_prompt, best_gen = 0.0, 0.0
    for _ in range(args.repeats):
        llm.reset()
        t = time.perf_counter()
        llm.eval(prompt)
        best_prompt = max(best_prompt, args.prompt_tokens / (time.perf_counter() - t))
        token = prompt[-1]
        t = time.perf_counter()
        for _ in range(args.gen_tokens):
            llm.eval([token])
            token = int(llm.scores[llm.n_tokens - 1].argmax())
        best_gen = max(best_gen, args.gen_tokens / (time.perf_counter() - t))
    print(json.dumps({
        "engine": f"llama.cpp via llama-cpp-python {llama_cpp.__version__}",
        "model": args.model,
        "threads": args.threads,
        "prompt_tokens": args.prompt_tokens,
        "gen_tokens": args.gen_tokens,
        "prompt_tokens_per_second": round(best_prompt, 1),
        "gen_tokens_per_second": round(best_gen, 1),
        "system_info": llama_cpp.llama_print_system_info().decode(errors="replace").strip(),
    }))


if __name__ == "__main__":
    main()
