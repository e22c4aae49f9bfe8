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
import numpy as np
from llama_cpp import Llama


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("gguf")
    ap.add_argument("questions")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--new-tokens", type=int, default=32)
    ap.add_argument("--batch", type=int, default=1)
    args = ap.parse_args()
    if args.batch > 1:
        batched(args)
        return
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
        prompt = prompt_tokens(llm, q)
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


def prompt_tokens(llm, question):
    # SmolLM2-Instruct's chat turns (ChatML); the decode rate hardly depends on them.
    text = "<|im_start|>user\n" + question + "<|im_end|>\n<|im_start|>assistant\n"
    return llm.tokenize(text.encode(), add_bos=False, special=True)


def batched(args):
    """Questions in batches of args.batch sequences through llama.cpp's own API: one
    evaluation of all prompts, then one evaluation a step of one token for each sequence, the
    greedy pick (argmax of the logits) made here. The decode rate is the tokens after each
    sequence's first over the time of those steps."""
    vocab_only = Llama(model_path=args.gguf, vocab_only=True, verbose=False)
    with open(args.questions) as f:
        prompts = [prompt_tokens(vocab_only, json.loads(line)["question"]) for line in f if line.strip()]
    llama_cpp.llama_backend_init()
    mp = llama_cpp.llama_model_default_params()
    model = llama_cpp.llama_model_load_from_file(args.gguf.encode(), mp)
    cp = llama_cpp.llama_context_default_params()
    cp.n_ctx = 4096
    cp.n_batch = cp.n_ubatch = 2048
    cp.n_seq_max = args.batch
    cp.n_threads = cp.n_threads_batch = args.threads
    ctx = llama_cpp.llama_init_from_model(model, cp)
    n_vocab = llama_cpp.llama_vocab_n_tokens(llama_cpp.llama_model_get_vocab(model))
    batch = llama_cpp.llama_batch_init(2048, 0, 1)

    def run(entries):
        # entries: (token, pos, seq, wants_logits)
        batch.n_tokens = len(entries)
        for i, (tok, pos, seq, want) in enumerate(entries):
            batch.token[i], batch.pos[i], batch.n_seq_id[i] = tok, pos, 1
            batch.seq_id[i][0], batch.logits[i] = seq, 1 if want else 0
        if llama_cpp.llama_decode(ctx, batch) != 0:
            raise SystemExit("llama_decode failed")

    def pick(i):
        ptr = llama_cpp.llama_get_logits_ith(ctx, i)
        return int(np.argmax(np.ctypeslib.as_array(ptr, shape=(n_vocab,))))

    decode_tokens, decode_s = 0, 0.0
    for g in range(0, len(prompts), args.batch):
        group = prompts[g : g + args.batch]
        llama_cpp.llama_memory_clear(llama_cpp.llama_get_memory(ctx), True)
        entries, last = [], []
        for seq, p in enumerate(group):
            entries += [(t, pos, seq, pos == len(p) - 1) for pos, t in enumerate(p)]
            last.append(len(entries) - 1)
        run(entries)
        toks = [pick(i) for i in last]
        lens = [len(p) for p in group]
        start = time.perf_counter()
        for step in range(args.new_tokens - 1):
            run([(toks[s], lens[s] + step, s, True) for s in range(len(group))])
            toks = [pick(i) for i in range(len(group))]
        decode_s += time.perf_counter() - start
        decode_tokens += len(group) * (args.new_tokens - 1)
    print(
        json.dumps(
            {
                "questions": len(prompts),
                "batch": args.batch,
                "decode_tokens": decode_tokens,
                "decode_s": round(decode_s, 3),
                "decode_tokens_per_s": round(decode_tokens / decode_s, 1),
            }
        )
    )


if __name__ == "__main__":
    main()
