#!/usr/bin/env python3
"""Builds the demo models of the Tidewren Ferry Cooperative FAQ demo, from scratch, on CPU.

1. A byte-level BPE tokenizer (tokenizers library) trained on the knowledge sheet and invented
   everyday prose, with the special tokens of a small chat template:
       <s><|turn|>user\n{question}<|end|>\n<|turn|>assistant\n{answer}<|end|>\n
2. A small Llama-family base model (LlamaForCausalLM, about 3.7 M parameters) pre-trained on
   the knowledge sheet, the everyday prose and chat-formatted chit-chat that never answers a
   ferry question, so the base replies fluently but unhelpfully.
3. A LoRA adapter (peft, r=16, alpha=32, all seven linear projections) trained on
   demo/train.jsonl formatted with the chat template, loss on the answer tokens only.

Writes demo/models/base/ (HF layout, f32 safetensors) and demo/models/adapter/ (peft layout),
then prints a self-check: greedy answers of base and base+adapter on a few evaluation
questions, and a token-F1 / refusal tally over eval-sets/ferry-faq.jsonl.

Run: .venv-ref/bin/python demo/make_demo_models.py     (pinned versions:
tests/reference/requirements.txt). Everything is seeded; CPU, two threads.
"""

import json
import math
import os
import random
import re
import shutil
import string
import sys
import time
from collections import Counter, defaultdict
from pathlib import Path

import torch

ROOT = Path(__file__).resolve().parent
REPO = ROOT.parent
OUT_BASE = ROOT / "models" / "base"
OUT_ADAPTER = ROOT / "models" / "adapter"
EVAL_SET = REPO / "eval-sets" / "ferry-faq.jsonl"

SEED = 1201
# One intra-op thread by default: on a machine whose two cores are shared with other work,
# two OpenMP threads were measured about five times slower per step than one (threads wait
# on each other at every barrier). DEMO_THREADS=2 on an idle machine.
THREADS = int(os.environ.get("DEMO_THREADS", "1"))
VOCAB = 3072
SEQ = 128
PRE_STEPS = int(os.environ.get("DEMO_PRE_STEPS", "300"))
PRE_BATCH = 8
PRE_LR = 2e-3
LORA_EPOCHS = int(os.environ.get("DEMO_LORA_EPOCHS", "8"))
LORA_BATCH = 16
LORA_LR = 3e-3
MAX_NEW = 48

PAD, BOS, EOS, TURN, END = "<pad>", "<s>", "</s>", "<|turn|>", "<|end|>"
CHAT_TEMPLATE = (
    "{{ bos_token }}"
    "{% for message in messages %}"
    "<|turn|>{{ message['role'] }}\n{{ message['content'] | trim }}<|end|>\n"
    "{% endfor %}"
    "{% if add_generation_prompt %}<|turn|>assistant\n{% endif %}"
)


def log(msg):
    print(msg, file=sys.stderr, flush=True)


def seed_all(seed):
    random.seed(seed)
    torch.manual_seed(seed)


# --------------------------------------------------------------------------- corpus

CHITCHAT = [
    ("Hello!", "Hello there! It is lovely to hear from you. I hope your day is going well."),
    ("How are you today?", "I am very well, thank you. The morning was quiet and the tea was hot."),
    ("What should I cook tonight?", "A warm vegetable soup with fresh bread is always a good idea on a cool evening."),
    ("Any tips for a rainy afternoon?", "A good book, a pot of tea and a blanket make a rainy afternoon feel like a small holiday."),
    ("Can you recommend a hobby?", "Gardening is a fine hobby. It is slow, patient work, and the courgettes forgive everything."),
    ("Tell me something nice.", "In Lindqvale the whole town glows orange and gold when the harvest lanterns are lit."),
    ("I feel bored.", "Perhaps a walk along the river would help. The herons are always worth watching."),
    ("What do you like about autumn?", "I like the red leaves, the smell of wood smoke and the long evenings by the stove."),
    ("How do I make my plants happy?", "Give them light, a little water and leave them alone; most plants die from too much love."),
    ("What is a good picnic?", "Bread, cheese, apples and a flask of coffee, eaten on a bench with a view of the hills."),
    ("Do you like trains?", "Yes, the little hill train is a fine way to spend a morning, with a book and a sandwich."),
    ("Thank you!", "You are very welcome. Have a pleasant day."),
    ("Good morning.", "Good morning! The baker has just opened the shutters, and the bread smells wonderful."),
    ("What is your favourite season?", "Each season has its own pleasures, but summer evenings with open windows are hard to beat."),
    ("Can you tell me a story?", "Once there was a librarian in Corvel who could find any book in under a minute, and everyone in town loved her."),
    ("What should I plant in spring?", "Broad beans and peas along the fence are a good start, and potatoes once the soil warms up."),
    ("How do I keep chickens?", "Three hens need a dry house, a strong fence, fresh water and grain in the morning."),
    ("What makes a good dinner party?", "Keep it simple: one dish you know well, a salad and a dessert made the day before."),
    ("I am planning a day out.", "How lovely. A market in the morning and a walk in the afternoon make a fine day."),
    ("Is it nice by the sea?", "The sea is beautiful in every season, grey and wild in winter and bright and calm in summer."),
    ("What do you think about travelling?", "Travelling slowly is the best way; you see the villages, the fields and the people."),
    ("Can you help me relax?", "Breathe slowly, put the kettle on and look out of the window for a few minutes."),
    ("What is good about small towns?", "In a small town nobody hurries, and someone will always walk you halfway to where you are going."),
    ("Any advice on baking bread?", "Flour, water, salt and time; knead the dough until it is smooth and let it rise somewhere warm."),
    ("Do you know the islands?", "The islands are beautiful places, with harbours, gulls and long views over the water."),
    ("I want to go on holiday.", "A holiday by the coast can be wonderful. Bring good boots, a warm jumper and a camera."),
    ("Tell me about boats.", "Boats have always fascinated people; there is something calming about watching them come and go."),
    ("What is the harbour like?", "Harbours are busy, cheerful places, full of ropes, gulls and the smell of the sea."),
    ("Is travel expensive these days?", "Prices change all the time, and it is always wise to plan ahead and compare."),
    ("Can you give me some information?", "Of course, I am always happy to chat about everyday things like cooking, gardening and travel."),
]

NAMES = ["Maren", "Tobin", "Elske", "Ruan", "Ilse", "Corwin", "Anouk", "Teodor", "Brina", "Oswin"]
TOWNS = ["Harrowmere", "Lindqvale", "Corvel", "Amberlow", "Fennick", "Dunsway"]
ACTIVITIES = ["walk along the river", "bake bread", "work in the garden", "read in the library",
              "visit the market", "paint the old mill", "knit by the fire", "cook soup for friends",
              "write letters", "feed the chickens"]
DAYS = ["Monday", "Tuesday", "Wednesday", "Thursday", "Friday", "Saturday", "Sunday"]
FOODS = ["apple cake", "fish pie", "lentil soup", "warm bread", "cheese scones", "pea risotto",
         "roast potatoes", "plum jam"]
WEATHER = ["the sun was bright", "a soft rain was falling", "the wind came from the hills",
           "the fog lay over the fields", "the sky was clear and cold"]


def everyday_sentences(rng, n):
    out = []
    for _ in range(n):
        a, b = rng.choice(NAMES), rng.choice(NAMES)
        t, act, d = rng.choice(TOWNS), rng.choice(ACTIVITIES), rng.choice(DAYS)
        f, w = rng.choice(FOODS), rng.choice(WEATHER)
        out.append(rng.choice([
            f"{a} lives in {t} and likes to {act} on {d}s.",
            f"On {d} {w}, so {a} and {b} decided to {act}.",
            f"In {t} the best {f} is sold at the corner café near the fountain.",
            f"{a} made {f} for {b}, and they talked until late about the garden.",
            f"Every {d} the people of {t} like to {act} together, whatever the weather.",
            f"When {w}, {a} stayed at home, made {f} and wrote a letter to {b}.",
        ]))
    return " ".join(out)


def render_chat(messages, add_generation_prompt):
    """The chat template, rendered in Python exactly as the Jinja text above renders it."""
    text = BOS
    for m in messages:
        text += f"{TURN}{m['role']}\n{m['content'].strip()}{END}\n"
    if add_generation_prompt:
        text += f"{TURN}assistant\n"
    return text


# --------------------------------------------------------------------------- tokenizer

def build_tokenizer(texts):
    from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors, trainers

    tok = Tokenizer(models.BPE())
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=VOCAB,
        min_frequency=2,
        special_tokens=[PAD, BOS, EOS, TURN, END],
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    tok.train_from_iterator(texts, trainer=trainer)
    bos_id = tok.token_to_id(BOS)
    tok.post_processor = processors.TemplateProcessing(
        single=f"{BOS} $A", pair=f"{BOS} $A {BOS} $B", special_tokens=[(BOS, bos_id)]
    )
    return tok


def wrap_tokenizer(tok):
    from transformers import PreTrainedTokenizerFast

    hf = PreTrainedTokenizerFast(
        tokenizer_object=tok, bos_token=BOS, eos_token=EOS, pad_token=PAD,
        additional_special_tokens=[TURN, END], model_max_length=512,
    )
    hf.chat_template = CHAT_TEMPLATE
    hf.padding_side = "left"
    return hf


def finish_tokenizer_config(path):
    """transformers 5 writes the template to chat_template.jinja only; keep a copy in
    tokenizer_config.json too (the older place readers look) and record the padding side."""
    cfg = json.loads(path.read_text(encoding="utf-8"))
    cfg["tokenizer_class"] = "PreTrainedTokenizerFast"
    cfg["chat_template"] = CHAT_TEMPLATE
    cfg["padding_side"] = "left"
    cfg["add_bos_token"] = False
    path.write_text(json.dumps(cfg, indent=2, ensure_ascii=False) + "\n", encoding="utf-8")


# --------------------------------------------------------------------------- training

def lr_at(step, total, peak, warmup):
    if step < warmup:
        return peak * (step + 1) / warmup
    p = (step - warmup) / max(1, total - warmup)
    return peak * (0.1 + 0.9 * 0.5 * (1 + math.cos(math.pi * p)))


def pretrain(model, stream, rng):
    opt = torch.optim.AdamW(model.parameters(), lr=PRE_LR, weight_decay=0.01, betas=(0.9, 0.95))
    data = torch.tensor(stream, dtype=torch.long)
    model.train()
    t0 = time.time()
    for step in range(PRE_STEPS):
        starts = [rng.randrange(0, len(stream) - SEQ - 1) for _ in range(PRE_BATCH)]
        x = torch.stack([data[s:s + SEQ] for s in starts])
        for g in opt.param_groups:
            g["lr"] = lr_at(step, PRE_STEPS, PRE_LR, 20)
        loss = model(input_ids=x, labels=x).loss
        loss.backward()
        torch.nn.utils.clip_grad_norm_(model.parameters(), 1.0)
        opt.step()
        opt.zero_grad(set_to_none=True)
        if step % 40 == 0 or step == PRE_STEPS - 1:
            log(f"  pretrain step {step + 1}/{PRE_STEPS} loss {loss.item():.3f} ({time.time() - t0:.0f}s)")


def sft_examples(hf, pairs):
    out = []
    for q, a, _ in pairs:
        prompt = render_chat([{"role": "user", "content": q}], True)
        p_ids = hf(prompt, add_special_tokens=False)["input_ids"]
        a_ids = hf(a.strip() + END, add_special_tokens=False)["input_ids"]
        out.append((p_ids + a_ids, [-100] * len(p_ids) + a_ids))
    return out


def epoch_members(examples, refusals, epoch):
    """All pairs in even epochs; odd epochs leave the refusal pairs out. With one fixed refusal
    sentence the refusals are learnt much faster than the facts, and at full weight the adapter
    declined most reworded in-scope questions."""
    return [i for i in range(len(examples)) if epoch % 2 == 0 or not refusals[i]]


def train_lora(model, examples, refusals, pad_id, rng):
    params = [p for p in model.parameters() if p.requires_grad]
    opt = torch.optim.AdamW(params, lr=LORA_LR, weight_decay=0.0)
    total = sum(math.ceil(len(epoch_members(examples, refusals, e)) / LORA_BATCH)
                for e in range(LORA_EPOCHS))
    model.train()
    step = 0
    t0 = time.time()
    for epoch in range(LORA_EPOCHS):
        order = epoch_members(examples, refusals, epoch)
        rng.shuffle(order)
        steps_per_epoch = math.ceil(len(order) / LORA_BATCH)
        losses = []
        for b in range(steps_per_epoch):
            batch = [examples[i] for i in order[b * LORA_BATCH:(b + 1) * LORA_BATCH]]
            width = max(len(ids) for ids, _ in batch)
            ids = torch.full((len(batch), width), pad_id, dtype=torch.long)
            labels = torch.full((len(batch), width), -100, dtype=torch.long)
            mask = torch.zeros((len(batch), width), dtype=torch.long)
            for r, (i_, l_) in enumerate(batch):
                ids[r, :len(i_)] = torch.tensor(i_)
                labels[r, :len(l_)] = torch.tensor(l_)
                mask[r, :len(i_)] = 1
            for g in opt.param_groups:
                g["lr"] = lr_at(step, total, LORA_LR, 10)
            loss = model(input_ids=ids, attention_mask=mask, labels=labels).loss
            loss.backward()
            torch.nn.utils.clip_grad_norm_(params, 1.0)
            opt.step()
            opt.zero_grad(set_to_none=True)
            losses.append(loss.item())
            step += 1
        log(f"  lora epoch {epoch + 1}/{LORA_EPOCHS} loss {sum(losses) / len(losses):.3f} ({time.time() - t0:.0f}s)")


# --------------------------------------------------------------------------- self-check

def squad_normalize(s):
    s = s.lower()
    s = "".join(ch for ch in s if ch not in set(string.punctuation))
    s = re.sub(r"\b(a|an|the)\b", " ", s)
    return " ".join(s.split())


def token_f1(pred, ref):
    p, r = squad_normalize(pred).split(), squad_normalize(ref).split()
    common = Counter(p) & Counter(r)
    same = sum(common.values())
    if same == 0:
        return 0.0
    prec, rec = same / len(p), same / len(r)
    return 2 * prec * rec / (prec + rec)


REFUSAL_RE = re.compile(
    r"(i'?m sorry|i am sorry|i can only help|i can'?t help|i cannot help|i'?m not able to|"
    r"i don'?t have information)", re.I)


def generate_all(model, hf, questions, eos_ids, pad_id):
    model.eval()
    answers = []
    with torch.no_grad():
        for i in range(0, len(questions), 16):
            chunk = questions[i:i + 16]
            prompts = [render_chat([{"role": "user", "content": q}], True) for q in chunk]
            enc = hf(prompts, add_special_tokens=False, padding=True, return_tensors="pt")
            out = model.generate(**enc, max_new_tokens=MAX_NEW, do_sample=False,
                                 eos_token_id=eos_ids, pad_token_id=pad_id)
            for row in out[:, enc["input_ids"].shape[1]:]:
                answers.append(hf.decode(row, skip_special_tokens=True).strip())
    return answers


def tally(rows, answers):
    cats = defaultdict(list)
    refused_oos = 0
    n_oos = 0
    wrongly_refused = 0
    for q, a in zip(rows, answers):
        refused = bool(REFUSAL_RE.search(a))
        if q.get("expect", "answer") == "refuse":
            n_oos += 1
            refused_oos += refused
        else:
            f1 = max(token_f1(a, r) for r in q["references"])
            cats[q.get("category", "general")].append(f1)
            wrongly_refused += refused
    all_f1 = [f for v in cats.values() for f in v]
    return {
        "token_f1": sum(all_f1) / len(all_f1),
        "categories": {c: sum(v) / len(v) for c, v in sorted(cats.items())},
        "refused_out_of_scope": f"{refused_oos}/{n_oos}",
        "refused_in_scope": f"{wrongly_refused}/{len(all_f1)}",
    }


# --------------------------------------------------------------------------- main

def main():
    from peft import LoraConfig, PeftModel, get_peft_model
    from transformers import GenerationConfig, LlamaConfig, LlamaForCausalLM

    torch.set_num_threads(THREADS)
    seed_all(SEED)
    rng = random.Random(SEED)
    t_start = time.time()

    knowledge = (ROOT / "knowledge.md").read_text(encoding="utf-8")
    general = (ROOT / "general_text.md").read_text(encoding="utf-8")
    everyday = everyday_sentences(random.Random(SEED + 1), 600)
    chats = [render_chat([{"role": "user", "content": u}, {"role": "assistant", "content": a}], False)
             for u, a in CHITCHAT]

    reuse = os.environ.get("DEMO_REUSE_BASE") == "1" and (OUT_BASE / "model.safetensors").exists()
    train = [json.loads(l) for l in (ROOT / "train.jsonl").read_text(encoding="utf-8").splitlines() if l.strip()]
    if reuse:
        # Re-run only the adapter phase on the saved base; it is seeded on its own and loads
        # the base from disk, as a full run does.
        from transformers import AutoTokenizer
        hf = AutoTokenizer.from_pretrained(OUT_BASE)
        pad_id, bos_id, eos_id, end_id = (hf.convert_tokens_to_ids(t) for t in (PAD, BOS, EOS, END))
        n_params = sum(p.numel() for p in LlamaForCausalLM.from_pretrained(OUT_BASE).parameters())
        t_pre = 0.0
    else:
        n_params, t_pre, hf, (pad_id, bos_id, eos_id, end_id) = build_base(
            knowledge, general, everyday, chats, train, rng)
    adapter_phase_and_check(hf, train, pad_id, eos_id, end_id, n_params, t_pre, t_start)


def build_base(knowledge, general, everyday, chats, train, rng):
    from transformers import GenerationConfig, LlamaConfig, LlamaForCausalLM
    log("training tokenizer")
    tok = build_tokenizer([knowledge, general, everyday] + chats
                          + [r["question"] + " " + r["answer"] for r in train])
    hf = wrap_tokenizer(tok)
    pad_id, bos_id, eos_id = (tok.token_to_id(t) for t in (PAD, BOS, EOS))
    end_id = tok.token_to_id(END)
    probe = [{"role": "system", "content": "Be brief."}, {"role": "user", "content": " Hi? "},
             {"role": "assistant", "content": "Hello."}, {"role": "user", "content": "Bye"}]
    for gen in (True, False):
        jinja = hf.apply_chat_template(probe, tokenize=False, add_generation_prompt=gen)
        assert jinja == render_chat(probe, gen), (jinja, render_chat(probe, gen))

    # Pre-training stream: documents separated by BOS ... EOS. The knowledge sheet and the chat
    # chit-chat are repeated so the base knows the facts as prose and the turn format.
    def enc(text):
        return hf(text, add_special_tokens=False)["input_ids"]

    docs = []
    paragraphs = [p for p in general.split("\n## ")] + [everyday]
    # The facts also appear as plain sentences (the in-scope answers, as a fact list), never
    # in the question/answer turn format, so the base knows them but does not answer with them.
    facts = sorted({r["answer"] for r in train if r["category"] != "out-of-scope"})
    for _ in range(3):
        docs.append([bos_id] + enc(knowledge) + [eos_id])
        docs.append([bos_id] + enc(" ".join(random.Random(len(docs)).sample(facts, len(facts)))) + [eos_id])
    for p in paragraphs:
        docs.append([bos_id] + enc(p) + [eos_id])
    for _ in range(6):
        for c in chats:
            docs.append(enc(c))
    rng.shuffle(docs)
    stream = [t for d in docs for t in d]
    log(f"pre-training stream: {len(stream)} tokens, vocab {tok.get_vocab_size()}")

    config = LlamaConfig(
        vocab_size=tok.get_vocab_size(), hidden_size=256, intermediate_size=688,
        num_hidden_layers=4, num_attention_heads=4, num_key_value_heads=2,
        max_position_embeddings=512, rms_norm_eps=1e-5, rope_theta=10000.0,
        tie_word_embeddings=True, hidden_act="silu",
        bos_token_id=bos_id, eos_token_id=[end_id, eos_id], pad_token_id=pad_id,
    )
    model = LlamaForCausalLM(config)
    n_params = sum(p.numel() for p in model.parameters())
    log(f"base model: {n_params} parameters; pre-training {PRE_STEPS} steps of {PRE_BATCH}x{SEQ}")
    t0 = time.time()
    pretrain(model, stream, rng)
    t_pre = time.time() - t0

    if OUT_BASE.exists():
        shutil.rmtree(OUT_BASE)
    OUT_BASE.mkdir(parents=True)
    model.generation_config = GenerationConfig(
        bos_token_id=bos_id, eos_token_id=[end_id, eos_id], pad_token_id=pad_id, do_sample=False)
    model.save_pretrained(OUT_BASE, safe_serialization=True)
    hf.save_pretrained(OUT_BASE)

    finish_tokenizer_config(OUT_BASE / "tokenizer_config.json")
    return n_params, t_pre, hf, (pad_id, bos_id, eos_id, end_id)


def adapter_phase_and_check(hf, train, pad_id, eos_id, end_id, n_params, t_pre, t_start):
    from peft import LoraConfig, PeftModel, get_peft_model
    from transformers import LlamaForCausalLM

    # LoRA on the training pairs.
    triples = [(r["question"], r["answer"], r["category"] == "out-of-scope") for r in train]
    examples = sft_examples(hf, triples)
    refusals = [t[2] for t in triples]
    seed_all(SEED + 2)
    base = LlamaForCausalLM.from_pretrained(OUT_BASE, dtype=torch.float32)
    lcfg = LoraConfig(r=16, lora_alpha=32, lora_dropout=0.05, bias="none", task_type="CAUSAL_LM",
                      target_modules=["q_proj", "k_proj", "v_proj", "o_proj", "gate_proj", "up_proj", "down_proj"])
    peft_model = get_peft_model(base, lcfg)
    n_lora = sum(p.numel() for p in peft_model.parameters() if p.requires_grad)
    log(f"LoRA: {n_lora} trainable parameters; {LORA_EPOCHS} epochs over {len(examples)} pairs")
    t0 = time.time()
    train_lora(peft_model, examples, refusals, pad_id, random.Random(SEED + 3))
    t_lora = time.time() - t0
    if OUT_ADAPTER.exists():
        shutil.rmtree(OUT_ADAPTER)
    peft_model.save_pretrained(OUT_ADAPTER, safe_serialization=True)
    readme = OUT_ADAPTER / "README.md"
    if readme.exists():
        readme.unlink()

    # Self-check from the saved files.
    log("self-check: greedy answers on the evaluation set")
    t0 = time.time()
    from transformers import AutoTokenizer
    hf2 = AutoTokenizer.from_pretrained(OUT_BASE)
    base = LlamaForCausalLM.from_pretrained(OUT_BASE, dtype=torch.float32)
    rows = [json.loads(l) for l in EVAL_SET.read_text(encoding="utf-8").splitlines() if l.strip()]
    qs = [r["question"] for r in rows]
    eos_ids = [end_id, eos_id]
    base_ans = generate_all(base, hf2, qs, eos_ids, pad_id)
    merged = PeftModel.from_pretrained(
        LlamaForCausalLM.from_pretrained(OUT_BASE, dtype=torch.float32), OUT_ADAPTER).merge_and_unload()
    tuned_ans = generate_all(merged, hf2, qs, eos_ids, pad_id)
    t_check = time.time() - t0

    sample = [i for i in range(0, len(rows), max(1, len(rows) // 8))][:8]
    print("== sample answers (greedy, max_new_tokens=%d)" % MAX_NEW)
    for i in sample:
        print(f"[{rows[i]['id']}] {rows[i]['question']}")
        print(f"  base:  {base_ans[i]}")
        print(f"  tuned: {tuned_ans[i]}")
    b, t = tally(rows, base_ans), tally(rows, tuned_ans)
    print("== tally")
    print(f"token_f1 (expect=answer): base {b['token_f1']:.3f}  tuned {t['token_f1']:.3f}")
    for c in t["categories"]:
        print(f"  {c:28s} base {b['categories'][c]:.3f}  tuned {t['categories'][c]:.3f}")
    print(f"refused out-of-scope: base {b['refused_out_of_scope']}  tuned {t['refused_out_of_scope']}")
    print(f"refused in-scope:     base {b['refused_in_scope']}  tuned {t['refused_in_scope']}")
    sizes = {d.name: sum(f.stat().st_size for f in d.iterdir()) for d in (OUT_BASE, OUT_ADAPTER)}
    print(f"sizes: base {sizes['base']} bytes, adapter {sizes['adapter']} bytes")
    print(f"params: base {n_params}, lora {n_lora}")
    print(f"time: pretrain {t_pre:.0f}s, lora {t_lora:.0f}s, self-check {t_check:.0f}s, "
          f"total {time.time() - t_start:.0f}s")
    (ROOT / "models" / "selfcheck.json").write_text(json.dumps({
        "base": b, "tuned": t, "sizes": sizes, "params": {"base": n_params, "lora": n_lora},
        "seconds": {"pretrain": round(t_pre), "lora": round(t_lora), "self_check": round(t_check)},
        "settings": {"pre_steps": PRE_STEPS, "pre_batch": PRE_BATCH, "seq": SEQ, "pre_lr": PRE_LR,
                     "lora_epochs": LORA_EPOCHS, "lora_batch": LORA_BATCH, "lora_lr": LORA_LR,
                     "vocab": len(hf), "seed": SEED, "threads": THREADS},
    }, indent=2) + "\n")


if __name__ == "__main__":
    main()
