#!/usr/bin/env python
"""Throughput of `liftgate answer` against PyTorch + transformers on the same work, in one run.

Run through bench/throughput.sh, which builds liftgate, the benchmark models and the peer's
virtual environment first. Every configuration runs once per round, liftgate and peer runs
alternating, so slow drift of a shared machine hits both sides alike. Prints a table and writes
all raw figures as JSON.

Measured per run: generated tokens per second over the generation loop (model loading
excluded on both sides; prompt prefill included on both sides) and the peak resident memory of
the process. Also: memory bandwidth (STREAM-style triad, bench/peer/stream.c) and, for batch 1,
the bandwidth bound = bytes of weights read per token / bandwidth.
"""
import argparse
import json
import os
import re
import statistics
import subprocess
import sys
import tempfile
import time

HERE = os.path.dirname(os.path.abspath(__file__))


def liftgate_job(binary, model, questions, batch, threads, new_tokens, ignore_eos=True,
                 weights="f32"):
    with tempfile.TemporaryDirectory() as tmp:
        out = os.path.join(tmp, "answers.jsonl")
        cmd = [binary, "answer", "--model", model, "--questions", questions, "--out", out,
               "--max-new-tokens", str(new_tokens), "--batch", str(batch),
               "--threads", str(threads), "--weights", weights]
        if ignore_eos:
            cmd.append("--ignore-eos")
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE,
                                text=True)
        err = proc.stderr.read()
        _, status, usage = os.wait4(proc.pid, 0)
        proc.returncode = os.waitstatus_to_exitcode(status)
        wall = time.perf_counter() - t0
        if proc.returncode != 0:
            sys.exit(f"liftgate failed ({proc.returncode}): {' '.join(cmd)}\n{err}")
        m = re.search(r"answered (\d+) questions: (\d+) new tokens in ([0-9.]+) s", err)
        if not m:
            sys.exit(f"no summary line from liftgate:\n{err}")
        n_q, tokens, secs = int(m.group(1)), int(m.group(2)), float(m.group(3))
        return {"questions": n_q, "generated_tokens": tokens, "gen_wall_s": secs,
                "tokens_per_s": round(tokens / secs, 2), "process_wall_s": round(wall, 2),
                "peak_rss_MiB": round(usage.ru_maxrss / 1024, 1)}


def peer_job(python, model, questions, dtype, batch, threads, new_tokens, limit):
    cmd = [python, os.path.join(HERE, "peer", "peer_generate.py"), model, questions,
           "--batch", str(batch), "--dtype", dtype, "--new-tokens", str(new_tokens),
           "--threads", str(threads)]
    if limit:
        cmd += ["--limit", str(limit)]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        sys.exit(f"peer failed ({proc.returncode}): {' '.join(cmd)}\n{proc.stderr}")
    r = json.loads(proc.stdout.strip().splitlines()[-1])
    return {k: r[k] for k in ("questions", "generated_tokens", "gen_wall_s", "tokens_per_s",
                              "peak_rss_MiB", "torch", "transformers")}


def bandwidth(threads):
    exe = os.path.join(tempfile.gettempdir(), "liftgate-bench-stream")
    subprocess.run(["gcc", "-O3", "-march=native", "-fopenmp",
                    os.path.join(HERE, "peer", "stream.c"), "-o", exe], check=True)
    env = dict(os.environ, OMP_NUM_THREADS=str(threads))
    out = subprocess.run([exe, "1024", "10"], capture_output=True, text=True, check=True,
                         env=env).stdout
    return json.loads(out)


def refill_check(binary, model, questions, batch, threads, new_tokens, rounds, tmp):
    """Continuous refill against static batches of the same size, eos enabled: static batches
    are emulated by answering the set in consecutive chunks of `batch` questions (each chunk
    runs until its longest answer ends, as a batch without refill does). Generation time only."""
    with open(questions) as f:
        lines = [line for line in f if line.strip()]
    chunks = []
    for i in range(0, len(lines), batch):
        p = os.path.join(tmp, f"chunk{i // batch}.jsonl")
        with open(p, "w") as o:
            o.writelines(lines[i:i + batch])
        chunks.append(p)
    out = []
    for rnd in range(1, rounds + 1):
        r = liftgate_job(binary, model, questions, batch, threads, new_tokens, ignore_eos=False)
        static = [liftgate_job(binary, model, c, batch, threads, new_tokens, ignore_eos=False)
                  for c in chunks]
        s_secs = sum(x["gen_wall_s"] for x in static)
        s_tokens = sum(x["generated_tokens"] for x in static)
        row = {"round": rnd, "refill_s": r["gen_wall_s"], "static_s": round(s_secs, 2),
               "refill_tokens": r["generated_tokens"], "static_tokens": s_tokens,
               "speedup": round(s_secs / r["gen_wall_s"], 2)}
        print(f"round {rnd} refill {row['refill_s']:.2f} s vs static batches "
              f"{row['static_s']:.2f} s ({row['speedup']:.2f}x)", flush=True)
        out.append(row)
    return out


def weight_bytes(model):
    return sum(os.path.getsize(os.path.join(model, f)) for f in os.listdir(model)
               if f.endswith(".safetensors"))


def head(path, n, tmpdir):
    out = os.path.join(tmpdir, f"first{n}.jsonl")
    with open(path) as f, open(out, "w") as o:
        lines = [line for line in f if line.strip()][:n]
        o.writelines(lines)
    return out


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--liftgate", required=True)
    ap.add_argument("--python", required=True, help="python of the peer's environment")
    ap.add_argument("--models", required=True)
    ap.add_argument("--questions", default=os.path.join(HERE, "bench-questions.jsonl"))
    ap.add_argument("--shapes", default="llama100m-shape,qwen05-shape")
    ap.add_argument("--liftgate-configs", default="f32:1,f32:16,f32:32,bf16:32",
                    help="weights:batch pairs (f32 equals the reference; bf16 approximates)")
    ap.add_argument("--peer-configs", default="f32:1,f32:16,bf16:16,bf16:32")
    ap.add_argument("--batch1-questions", type=int, default=16,
                    help="questions for batch-1 runs on both sides (batch 1 is slow)")
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--new-tokens", type=int, default=32)
    ap.add_argument("--rounds", type=int, default=2)
    ap.add_argument("--json-out", default=None)
    ap.add_argument("--refill-model", default=None,
                    help="also compare continuous refill with static batches on this model")
    ap.add_argument("--refill-questions", default=None)
    ap.add_argument("--refill-batch", type=int, default=8)
    ap.add_argument("--refill-new-tokens", type=int, default=48)
    a = ap.parse_args()

    tmp = tempfile.mkdtemp(prefix="liftgate-bench-")
    q_small = head(a.questions, a.batch1_questions, tmp)
    bw = bandwidth(a.threads)
    triad = bw["triad_best_GBs"]
    print(f"memory bandwidth ({a.threads} threads, triad best): {triad:.1f} GB/s", flush=True)

    jobs = []
    lg = [("liftgate", c.split(":")[0], int(c.split(":")[1]))
          for c in a.liftgate_configs.split(",")]
    peer = [("peer", c.split(":")[0], int(c.split(":")[1])) for c in a.peer_configs.split(",")]
    # Alternate sides: liftgate, peer, liftgate, peer, ...
    for i in range(max(len(lg), len(peer))):
        if i < len(lg):
            jobs.append(lg[i])
        if i < len(peer):
            jobs.append(peer[i])

    results = []
    for rnd in range(1, a.rounds + 1):
        for shape in a.shapes.split(","):
            model = os.path.join(a.models, shape)
            for side, dtype, batch in jobs:
                qs = q_small if batch == 1 else a.questions
                if side == "liftgate":
                    r = liftgate_job(a.liftgate, model, qs, batch, a.threads, a.new_tokens,
                                     weights=dtype)
                else:
                    r = peer_job(a.python, model, qs, dtype, batch, a.threads, a.new_tokens,
                                 a.batch1_questions if batch == 1 else 0)
                r.update({"round": rnd, "shape": shape, "side": side, "dtype": dtype,
                          "batch": batch})
                results.append(r)
                print(f"round {rnd} {shape:16} {side:8} {dtype:4} batch {batch:2}: "
                      f"{r['tokens_per_s']:7.1f} tokens/s, peak RSS {r['peak_rss_MiB']:.0f} MiB",
                      flush=True)

    summary = []
    print()
    print("| model | liftgate best (f32) | peer best | ratio | liftgate bf16 (ratio) "
          "| liftgate batch 1 | bound (batch 1) | of bound | peer f32 batch 1 "
          "| liftgate peak RSS | weights |")
    print("|---|---|---|---|---|---|---|---|---|---|---|")
    for shape in a.shapes.split(","):
        rows = [r for r in results if r["shape"] == shape]

        def med(side, dtype, batch):
            v = [r["tokens_per_s"] for r in rows
                 if (r["side"], r["dtype"], r["batch"]) == (side, dtype, batch)]
            return statistics.median(v) if v else None

        lg_cfg = {(d, b): med("liftgate", d, b) for _, d, b in lg}
        peer_cfg = {(d, b): med("peer", d, b) for _, d, b in peer}
        lg_best = max(((k, v) for k, v in lg_cfg.items() if k[0] == "f32"),
                      key=lambda kv: kv[1])
        lg16 = [(k, v) for k, v in lg_cfg.items() if k[0] == "bf16"]
        lg16_best = max(lg16, key=lambda kv: kv[1]) if lg16 else None
        peer_best = max(peer_cfg.items(), key=lambda kv: kv[1])
        wb = weight_bytes(os.path.join(a.models, shape))
        bound = triad * 1e9 / wb
        lg1 = lg_cfg.get(("f32", 1))
        peer1 = peer_cfg.get(("f32", 1))
        rss = max(r["peak_rss_MiB"] for r in rows if r["side"] == "liftgate")
        s = {"shape": shape, "liftgate": {f"{d} batch {b}": v for (d, b), v in lg_cfg.items()},
             "peer": {f"{d} batch {b}": v for (d, b), v in peer_cfg.items()},
             "liftgate_best": {"config": f"batch {lg_best[0][1]}", "tokens_per_s": lg_best[1]},
             "peer_best": {"config": f"{peer_best[0][0]} batch {peer_best[0][1]}",
                           "tokens_per_s": peer_best[1]},
             "ratio": round(lg_best[1] / peer_best[1], 2),
             "liftgate_bf16_best": None if not lg16_best else
             {"config": f"batch {lg16_best[0][1]}", "tokens_per_s": lg16_best[1],
              "ratio": round(lg16_best[1] / peer_best[1], 2)},
             "weight_bytes": wb, "batch1_bound_tokens_per_s": round(bound, 1),
             "batch1_share_of_bound": round(lg1 / bound, 2) if lg1 else None,
             "liftgate_peak_rss_MiB": rss}
        summary.append(s)
        print(f"| {shape} | {lg_best[1]:.1f} (batch {lg_best[0][1]}) | {peer_best[1]:.1f} "
              f"({peer_best[0][0]}, batch {peer_best[0][1]}) | {s['ratio']:.2f}x | "
              + (f"{lg16_best[1]:.1f} ({lg16_best[1] / peer_best[1]:.2f}x) | " if lg16_best
                 else "- | ") +
              f"{lg1 or float('nan'):.1f} | {bound:.1f} | "
              f"{(s['batch1_share_of_bound'] or float('nan')) * 100:.0f}% | "
              f"{peer1 or float('nan'):.1f} | {rss:.0f} MiB | {wb / 2**20:.0f} MiB |")
    refill = None
    if a.refill_model:
        print("\ncontinuous refill vs static batches (eos enabled, batch "
              f"{a.refill_batch}, up to {a.refill_new_tokens} new tokens):")
        refill = refill_check(a.liftgate, a.refill_model, a.refill_questions, a.refill_batch,
                              a.threads, a.refill_new_tokens, a.rounds, tmp)
    doc = {"bandwidth": bw, "refill": refill, "threads": a.threads, "new_tokens": a.new_tokens,
           "rounds": a.rounds, "runs": results, "summary": summary,
           "machine": machine()}
    if a.json_out:
        with open(a.json_out, "w") as f:
            json.dump(doc, f, indent=1)
        print(f"\nraw figures: {a.json_out}")


def machine():
    info = {"cpus": os.cpu_count()}
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    info["cpu"] = line.split(":", 1)[1].strip()
                    break
        with open("/proc/meminfo") as f:
            info["mem_total"] = f.readline().split(":", 1)[1].strip()
    except OSError:
        pass
    return info


if __name__ == "__main__":
    main()
