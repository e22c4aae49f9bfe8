"""Greedy decoding speed of llama.cpp (through the llama-cpp-python binding, built from source
at install) on one GGUF file: the peer of `bench/llama_cpp.sh`.

For each prompt: the prompt is evaluated, then NEW tokens are drawn greedily (temperature 0,
end-of-sequence ignored: generation stops only at NEW tokens). The decode rate is the tokens
after the first over the time from the first token to the last, so the prompt step is left out
as liftgate's "decoding steps" figure leaves it out; and llama.cpp's own timing of those
single-token evaluations (`llama_perf_context`), which leaves out the binding's Python work per
token. Prints one JSON line.

    python llama_cpp_decode.py FILE PROMPTS_JSONL --threads 2 --new-tokens 32
"""

import argparse
import json
import time

import llama_cpp
from llama_cpp import Llama


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("gguf")
    ap.add_argument("questions")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--new-tokens", type=int, default=32)
    args = ap.parse_args()
    llm = Llama(
        model_path=args.gguf,
        n_threads=args.threads,
        n_threads_batch=args.threads,
        n_ctx=1024,
        n_batch=512,
        verbose=False,
    )
    decode_tokens, decode_s = 0, 0.0
    # llama.cpp's own count of its single-token evaluations: the decoding without the binding's
    # Python work per token (copying the logits out, calling the sampler).
    eval_n, eval_ms = 0, 0.0
    with open(args.questions) as f:
        questions = [json.loads(line)["question"] for line in f if line.strip()]
    for q in questions:
        # SmolLM2-Instruct's chat turns (ChatML); the decode rate hardly depends on them.
        text = "<|im_start|>user\n" + q + "<|im_end|>\n<|im_start|>assistant\n"
        prompt = llm.tokenize(text.encode(), add_bos=False, special=True)
        llm.reset()
        llama_cpp.llama_perf_context_reset(llm.ctx)
        n, first = 0, None
        for _ in llm.generate(prompt, temp=0.0, top_k=1, reset=True):
            n += 1
            if n == 1:
                first = time.perf_counter()
            if n == args.new_tokens:
                break
        decode_tokens += n - 1
        decode_s += time.perf_counter() - first
        perf = llama_cpp.llama_perf_context(llm.ctx)
        eval_n += perf.n_eval
        eval_ms += perf.t_eval_ms
    print(
        json.dumps(
            {
                "questions": len(questions),
                "decode_tokens": decode_tokens,
                "decode_s": round(decode_s, 3),
                "decode_tokens_per_s": round(decode_tokens / decode_s, 1),
                "llama_cpp_evals": eval_n,
                "llama_cpp_eval_tokens_per_s": round(eval_n / (eval_ms / 1e3), 1),
            }
        )
    )


if __name__ == "__main__":
    main()
