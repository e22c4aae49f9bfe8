#!/usr/bin/env python
"""Reference fixtures for liftgate's chat-template rendering, prompt encoding and decoding.

Run with the pinned environment in tests/reference/requirements.txt:

    /path/to/venv/bin/python tests/reference/make_template_fixtures.py

It trains a tiny byte-level BPE tokenizer (and a tiny WordPiece one) on invented ferry-cooperative
text with the `tokenizers` library, wraps it in transformers' PreTrainedTokenizerFast, and records,
for invented chat templates written in the styles of the common model families:

- the rendered prompt from transformers' own
  `apply_chat_template(messages, tokenize=False, add_generation_prompt=True)`,
- the token ids from `apply_chat_template(..., tokenize=True, return_dict=False)`,
- or, when the template calls `raise_exception`, the exception message,

plus `decode(ids, skip_special_tokens=True)` on a few id lists, and whole model directories saved
by `save_pretrained` for the loader. Everything goes to tests/fixtures/templates/.
No template calls `strftime_now`, so the fixtures do not depend on the date. The WordPiece
trainer breaks ties in an unstable order, so its vocabulary may change between runs; its ids and
expected text are always recorded together.
"""

import json
import random
import shutil
from pathlib import Path

import jinja2
import tokenizers
import transformers
from tokenizers import Tokenizer, decoders, models, pre_tokenizers, processors, trainers
from transformers import PreTrainedTokenizerFast

ROOT = Path(__file__).resolve().parents[2]
OUT = ROOT / "tests" / "fixtures" / "templates"

CORPUS = [
    "The Gullwing ferry leaves North Pier at seven every morning.",
    "Members of the island cooperative ride free on Tuesdays.",
    "Bicycles travel on the lower deck; dogs must stay on a lead.",
    "When the wind is above force eight, sailings are cancelled.",
    "Tickets can be bought at the kiosk or from the purser on board.",
    "The last boat back from Tern Island departs at 21:40.",
    "Die Fähre fährt um sieben Uhr ab. Grüß dich, Möwe!",
    "Where does the ferry stop? It stops at Kelp Bay and Tern Island.",
    "It's a short crossing, isn't it? About forty minutes, they're saying.",
    "You are a helpful assistant for the island ferry cooperative.",
    "Answer briefly. Question: Answer: system user assistant model",
    "  spaces   and\ttabs\nand newlines\n\n are kept  ",
    "Café, naïve, señor, 日本語, émoji 🙂 and ümlauts.",
    "0123456789 {}[]()<>:;,.!?'\"-_/\\|@#$%^&*+=~`",
] * 3

SPECIAL = [
    "<s>",
    "</s>",
    "<pad>",
    "<unk>",
    "<|begin_of_text|>",
    "<|start_header_id|>",
    "<|end_header_id|>",
    "<|eot_id|>",
    "<|im_start|>",
    "<|im_end|>",
    "<start_of_turn>",
    "<end_of_turn>",
    "[INST]",
    "[/INST]",
    "<|system|>",
    "<|user|>",
    "<|assistant|>",
    "<|end|>",
]
# An added token that is NOT special: decode(skip_special_tokens=True) keeps it.
NON_SPECIAL = ["<think>", "</think>"]


def train_bpe() -> Tokenizer:
    tok = Tokenizer(models.BPE(unk_token=None))
    tok.pre_tokenizer = pre_tokenizers.ByteLevel(add_prefix_space=False, use_regex=True)
    tok.decoder = decoders.ByteLevel()
    trainer = trainers.BpeTrainer(
        vocab_size=420,
        min_frequency=2,
        special_tokens=SPECIAL,
        initial_alphabet=pre_tokenizers.ByteLevel.alphabet(),
        show_progress=False,
    )
    tok.train_from_iterator(CORPUS, trainer=trainer)
    tok.add_tokens([tokenizers.AddedToken(t, special=False, normalized=False) for t in NON_SPECIAL])
    # BOS from the post-processor, as Llama-style tokenizer.json files do: used only by
    # add_special_tokens=True (the plain fallback), never by apply_chat_template.
    tok.post_processor = processors.TemplateProcessing(
        single="<s> $A",
        pair="<s> $A <s> $B",
        special_tokens=[("<s>", tok.token_to_id("<s>"))],
    )
    return tok


def train_wordpiece() -> Tokenizer:
    tok = Tokenizer(models.WordPiece(unk_token="[UNK]"))
    tok.normalizer = tokenizers.normalizers.BertNormalizer(lowercase=True)
    tok.pre_tokenizer = pre_tokenizers.BertPreTokenizer()
    tok.decoder = decoders.WordPiece()
    trainer = trainers.WordPieceTrainer(
        vocab_size=300, special_tokens=["[PAD]", "[UNK]", "[CLS]", "[SEP]"], show_progress=False
    )
    tok.train_from_iterator(CORPUS, trainer=trainer)
    return tok


# Invented templates in the styles of the common families. Each exercises Jinja2 features that
# real templates rely on (docs/model-formats.md §4).
TEMPLATES = {
    # Header-tag style (Llama-3-like), with a pinned date_string default and |trim.
    "header_tag": (
        "{{- bos_token }}\n"
        "{%- if not date_string is defined %}\n"
        "    {%- set date_string = \"26 Jul 2024\" %}\n"
        "{%- endif %}\n"
        "{%- if messages[0]['role'] == 'system' %}\n"
        "    {%- set system_message = messages[0]['content']|trim %}\n"
        "    {%- set messages = messages[1:] %}\n"
        "{%- else %}\n"
        "    {%- set system_message = \"\" %}\n"
        "{%- endif %}\n"
        "{{- \"<|start_header_id|>system<|end_header_id|>\\n\\n\" }}\n"
        "{{- \"Today Date: \" + date_string + \"\\n\\n\" }}\n"
        "{{- system_message }}\n"
        "{{- \"<|eot_id|>\" }}\n"
        "{%- for message in messages %}\n"
        "    {{- '<|start_header_id|>' + message['role'] + '<|end_header_id|>\\n\\n'+ message['content'] | trim + '<|eot_id|>' }}\n"
        "{%- endfor %}\n"
        "{%- if add_generation_prompt %}\n"
        "    {{- '<|start_header_id|>assistant<|end_header_id|>\\n\\n' }}\n"
        "{%- endif %}\n"
    ),
    # im_start style (Qwen2-like) with a default system message and loop.first.
    "im_start": (
        "{% for message in messages %}"
        "{% if loop.first and messages[0]['role'] != 'system' %}"
        "{{ '<|im_start|>system\\nYou are a helpful ferry assistant.<|im_end|>\\n' }}"
        "{% endif %}"
        "{{'<|im_start|>' + message['role'] + '\\n' + message['content'] + '<|im_end|>' + '\\n'}}"
        "{% endfor %}"
        "{% if add_generation_prompt %}{{ '<|im_start|>assistant\\n' }}{% endif %}"
    ),
    # Turn style (Gemma-like): rejects a system role, maps assistant -> model, loop.index0 parity.
    "turn_rejects_system": (
        "{{ bos_token }}{% if messages[0]['role'] == 'system' %}{{ raise_exception('System role not supported') }}{% endif %}"
        "{% for message in messages %}"
        "{% if (message['role'] == 'user') != (loop.index0 % 2 == 0) %}"
        "{{ raise_exception('Conversation roles must alternate user/assistant/user/assistant/...') }}"
        "{% endif %}"
        "{% if (message['role'] == 'assistant') %}{% set role = 'model' %}{% else %}{% set role = message['role'] %}{% endif %}"
        "{{ '<start_of_turn>' + role + '\n' + message['content'] | trim + '<end_of_turn>\n' }}"
        "{% endfor %}"
        "{% if add_generation_prompt %}{{'<start_of_turn>model\n'}}{% endif %}"
    ),
    # Turn style that folds the system text into the first user turn (loop.first, namespace).
    "turn_folds_system": (
        "{{ bos_token }}\n"
        "{% set ns = namespace(prefix='') %}\n"
        "{% if messages[0]['role'] == 'system' %}\n"
        "  {% set ns.prefix = messages[0]['content'].strip() + '\\n\\n' %}\n"
        "  {% set loop_messages = messages[1:] %}\n"
        "{% else %}\n"
        "  {% set loop_messages = messages %}\n"
        "{% endif %}\n"
        "{% for message in loop_messages %}\n"
        "  {% set role = 'model' if message['role'] == 'assistant' else message['role'] %}\n"
        "<start_of_turn>{{ role }}\n"
        "{{ (ns.prefix if loop.first else '') + message['content'].strip() }}<end_of_turn>\n"
        "{% endfor %}\n"
        "{% if add_generation_prompt %}\n"
        "<start_of_turn>model\n"
        "{% endif %}\n"
    ),
    # [INST] style (Llama-2 / Mistral-like): system in <<SYS>>, alternation check, eos after answers.
    "inst": (
        "{% if messages[0]['role'] == 'system' %}"
        "{% set loop_messages = messages[1:] %}{% set system_message = messages[0]['content'] %}"
        "{% else %}{% set loop_messages = messages %}{% set system_message = false %}{% endif %}"
        "{% for message in loop_messages %}"
        "{% if (message['role'] == 'user') != (loop.index0 % 2 == 0) %}"
        "{{ raise_exception('Conversation roles must alternate user/assistant/user/assistant/...') }}"
        "{% endif %}"
        "{% if loop.index0 == 0 and system_message != false %}"
        "{% set content = '<<SYS>>\\n' + system_message + '\\n<</SYS>>\\n\\n' + message['content'] %}"
        "{% else %}{% set content = message['content'] %}{% endif %}"
        "{% if message['role'] == 'user' %}{{ bos_token + '[INST] ' + content.strip() + ' [/INST]' }}"
        "{% elif message['role'] == 'assistant' %}{{ ' '  + content.strip() + ' ' + eos_token }}"
        "{% endif %}{% endfor %}"
    ),
    # <|user|> style (Phi-3-like) with an eos when no generation prompt is asked for.
    "pipe_role": (
        "{% for message in messages %}"
        "{% if message['role'] == 'system' %}{{'<|system|>\n' + message['content'] + '<|end|>\n'}}"
        "{% elif message['role'] == 'user' %}{{'<|user|>\n' + message['content'] + '<|end|>\n'}}"
        "{% elif message['role'] == 'assistant' %}{{'<|assistant|>\n' + message['content'] + '<|end|>\n'}}"
        "{% endif %}{% endfor %}"
        "{% if add_generation_prompt %}{{ '<|assistant|>\n' }}{% else %}{{ eos_token }}{% endif %}"
    ),
    # Qwen3-like: reverse scan with namespace + break, startswith/endswith, split, lstrip.
    "namespace_break": (
        "{%- set ns = namespace(last_query_index=messages|length - 1, seen=0) %}\n"
        "{%- for message in messages[::-1] %}\n"
        "    {%- set index = (messages|length - 1) - loop.index0 %}\n"
        "    {%- if message.role == 'user' and not message.content.startswith('<tool_response>') %}\n"
        "        {%- set ns.last_query_index = index %}\n"
        "        {%- break %}\n"
        "    {%- endif %}\n"
        "    {%- set ns.seen = ns.seen + 1 %}\n"
        "{%- endfor %}\n"
        "{%- for message in messages %}\n"
        "    {%- set content = message.content %}\n"
        "    {%- if message.role == 'assistant' and '</think>' in content %}\n"
        "        {%- set content = content.split('</think>')[-1].lstrip('\\n') %}\n"
        "    {%- endif %}\n"
        "    {{- '<|im_start|>' + message.role + '\\n' + content }}\n"
        "    {%- if loop.index0 == ns.last_query_index %}{{- ' [latest]' }}{%- endif %}\n"
        "    {%- if content.endswith('?') %}{{- ' (q)' }}{%- endif %}\n"
        "    {{- '<|im_end|>\\n' }}\n"
        "{%- endfor %}\n"
        "{{- 'seen=' ~ ns.seen ~ '\\n' }}\n"
        "{%- if add_generation_prompt %}\n"
        "    {{- '<|im_start|>assistant\\n<think>\\n\\n</think>\\n\\n' }}\n"
        "{%- endif %}\n"
    ),
    # Python dict methods: .items(), .get(), dict literal order, `is string`, `is mapping`.
    "items_get": (
        "{% set stops = {'North Pier': 'Nordhafen', 'Kelp Bay': 'Tangbucht', 'Tern Island': 'Seeschwalbe'} %}\n"
        "{% for name, alias in stops.items() %}\n"
        "{{ loop.index }}. {{ name }} = {{ alias }}{% if not loop.last %}, {% endif %}\n"
        "{% endfor %}\n"
        "{% for message in messages %}\n"
        "{% if message['content'] is string and message is mapping %}\n"
        "[{{ message.get('role', 'nobody') | upper }}|{{ message.get('name', 'anon') }}] {{ message['content'] }}\n"
        "{% endif %}\n"
        "{% endfor %}\n"
        "{% if add_generation_prompt %}[ASSISTANT] {% endif %}"
    ),
    # tojson of dicts with non-ASCII and HTML characters, with and without indent.
    "tojson": (
        "{% set meta = {'greeting': 'Grüß dich <Möwe> & \"co\"', 'stops': [1, 2.5, none, true], 'empty': {}} %}"
        "<|system|>\n{{ meta | tojson }}\n{{ meta | tojson(indent=2) }}<|end|>\n"
        "{% for message in messages %}<|{{ message.role }}|>\n{{ message | tojson }}<|end|>\n{% endfor %}"
        "{% if add_generation_prompt %}<|assistant|>\n{% endif %}"
    ),
    # Whitespace control with {%- -%} and {{- -}}, indentation stripped by lstrip_blocks.
    "whitespace_control": (
        "<s>\n"
        "    {%- for message in messages -%}\n"
        "        {{- ' ' -}}\n"
        "        {%- if message.role == 'system' -%}\n"
        "            (( {{ message.content }} ))\n"
        "        {%- else -%}\n"
        "            {{ message.role }}: {{- ' ' + message.content -}}\n"
        "        {%- endif %}\n"
        "\n"
        "    {% endfor %}\n"
        "  {% if add_generation_prompt %}\n"
        "    assistant:\n"
        "  {% endif %}\n"
    ),
    # Trailing newlines: Jinja2 drops exactly one; comments also honour trim_blocks.
    "trailing_newlines": (
        "{# a leading comment #}\n"
        "{% for message in messages %}\n"
        "### {{ message.role | capitalize }}\n"
        "{{ message.content }}\n"
        "\n"
        "{% endfor %}\n"
        "{% if add_generation_prompt %}\n"
        "### Assistant\n"
        "{% endif %}\n"
        "\n"
        "\n"
    ),
    # loop attributes, filters and Python-style printing of non-strings.
    "loop_filters": (
        "{{ messages | length }} message(s); first={{ (messages | first).role }}; "
        "last={{ (messages | last).role }}; roles={{ messages | map(attribute='role') | join(',') }}\n"
        "users={{ messages | selectattr('role', 'equalto', 'user') | list | length }}; "
        "has_system={{ messages[0].role == 'system' }}; nothing={{ none }}; "
        "list={{ ['a', 1, none, false] }}; missing=[{{ not_defined }}]; "
        "{{ missing_var | default('fallback') }}\n"
        "{% for m in messages %}{{ loop.index }}/{{ loop.length }}{{ '|' if loop.first }}{{ '!' if loop.last }} "
        "{{ m.content.replace('ferry', 'FERRY').lower()[:30] }}{{ '\\n' }}{% endfor %}"
        "{% if add_generation_prompt %}> {% endif %}"
    ),
    # {% generation %} marks assistant spans (transformers' AssistantTracker) and renders its body.
    "generation_tag": (
        "{% for message in messages %}"
        "{% if message['role'] == 'assistant' %}"
        "{{ '<|im_start|>assistant\\n' }}{% generation %}{{ message['content'] + '<|im_end|>' }}{% endgeneration %}{{ '\\n' }}"
        "{% else %}"
        "{{ '<|im_start|>' + message['role'] + '\\n' + message['content'] + '<|im_end|>\\n' }}"
        "{% endif %}"
        "{% endfor %}"
        "{%- if add_generation_prompt %}\n  {%- generation -%}\n{{ '<|im_start|>assistant\\n' }}\n  {%- endgeneration %}\n{% endif %}"
    ),
    # Macros, set blocks and filter blocks, and the string list forms of system content.
    "macros_set_blocks": (
        "{% macro turn(role, text) %}\n"
        "<|{{ role }}|>{{ text | trim }}<|end|>\n"
        "{% endmacro %}\n"
        "{% set header %}\n"
        "Ferry desk, {{ messages | length }} turn(s)\n"
        "{% endset %}\n"
        "{{ header | trim }}\n"
        "{% for m in messages %}\n"
        "{% filter upper %}{{ m.role }}{% endfilter %}:\n"
        "{{ turn(m.role, m.content) }}\n"
        "{% endfor %}\n"
        "{% if add_generation_prompt %}{{ turn('assistant', '') | replace('<|end|>', '') | trim }}{% endif %}"
    ),
    # Windows line endings in the template source (Jinja2 normalises them to \n).
    "crlf_source": (
        "{% for message in messages %}\r\n"
        "<|{{ message.role }}|>\r\n"
        "{{ message.content }}<|end|>\r\n"
        "{% endfor %}\r\n"
        "{% if add_generation_prompt %}<|assistant|>\r\n{% endif %}\r\n"
    ),
    # Dict builder, namespace accumulating a list, string multiplication and %-formatting.
    "dict_namespace_list": (
        "{%- set ns = namespace(parts=[]) %}\n"
        "{%- for m in messages %}\n"
        "    {%- set entry = dict(role=m.role, size=m.content | length) %}\n"
        "    {%- set ns.parts = ns.parts + [entry.role ~ ':' ~ entry.size] %}\n"
        "{%- endfor %}\n"
        "{{- '=' * 8 }} {{ ns.parts | join(' ') }} {{ '=' * 8 }}\n"
        "{%- for m in messages %}\n"
        "{{ '%s) %s' | format(loop.index, m.content) }}\n"
        "{%- endfor %}\n"
        "{%- if add_generation_prompt %}\n"
        "{{ '\\n' }}-> {% endif %}"
    ),
}


# Single-expression snippets rendered with the same environment and a fixed context, to pin down
# how values print and how Python-isms behave (Jinja2 prints str(x); tuples, None, True, floats).
SNIPPET_CONTEXT = {
    "messages": None,  # filled with CONVERSATIONS["system_user"]
    "meta": {"dock": "North Pier", "gate": 3, "night": None, "tags": ["a", "b"]},
    "word": "  Fähre  ",
    "n": 7,
    "f": 2.5,
    "flag": True,
    "sep": "\x1c ferry  boat \x1f\n",
    "tools": None,
    "documents": None,
    "add_generation_prompt": True,
}
SNIPPETS = [
    "{{ 'a' ~ 1 ~ 'b' }}",
    "{{ 'a' ~ none ~ true }}",
    "{{ 7 / 2 }}|{{ 4 / 2 }}|{{ 7 // 2 }}|{{ -7 // 2 }}|{{ 10 % 3 }}|{{ 2 ** 10 }}|{{ 0.1 + 0.2 }}|{{ 1e20 }}",
    "{{ 'abc'[::-1] }}|{{ 'abc'[1:] }}|{{ [1, 2, 3][-1] }}|{{ 'a,b'.split(',') }}",
    "{{ 'hello world'.title() }}|{{ 'Hello World'.split() }}|{{ 'a b c'.split(' ', 1) }}",
    "{{ [3, 1, 2] | sort }}|{{ range(3) | list }}|{{ [1, 2] + [3] }}|{{ 'ab' * 2 }}",
    "{{ meta | dictsort }}",
    "{{ (1, 'x') }}",
    "{{ meta }}",
    "{{ meta.items() | list }}",
    "{{ meta.keys() | list }}|{{ meta.values() | list }}",
    "{{ meta.get('gate') }}|{{ meta.get('nope') }}|{{ meta.get('nope', 'dflt') }}|{{ meta.nope }}|[{{ meta['nope'] }}]",
    "{{ none | string }}|{{ true | string }}|{{ 3.0 | int }}|{{ '5' | int + 1 }}|{{ 2 | float }}",
    "{{ '%.2f' | format(3.14159) }}|{{ '%s-%s' | format(none, true) }}|{{ '%d items' | format(n) }}",
    "{{ '{}-{}'.format(1, 2) }}",
    "{{ 'a' in 'cat' }}|{{ 'dock' in meta }}|{{ 'role' in messages[0] }}",
    "{{ [none, 1, 'x'] | join(',') }}",
    "{{ word | trim }}|{{ word.strip() }}|{{ word.rstrip() }}|{{ word.lstrip() }}|{{ word | length }}",
    "{{ word.strip().upper() }}|{{ word.strip().lower() }}|{{ 'x-y'.replace('-', '+') }}",
    "{{ 'abc'.upper().startswith('AB') }}|{{ 'abc'.endswith(('x', 'c')) }}",
    "{{ messages | selectattr('role', 'equalto', 'user') | map(attribute='content') | first }}",
    "{{ messages | rejectattr('role', 'equalto', 'system') | list | length }}",
    "{{ messages[0].content is defined }}|{{ meta.night is none }}|{{ nope is defined }}|{{ meta.tags is iterable }}",
    "{{ n is number }}|{{ word is string }}|{{ meta is mapping }}|{{ meta.tags is sequence }}|{{ f is float }}|{{ n is integer }}",
    "{{ 1 if none else 2 }}|{{ flag and 'yes' }}|{{ none or 'empty' }}|{{ not flag }}",
    "{% for m in messages %}{{ loop.revindex }}{{ loop.cycle('a', 'b') }}{{ loop.previtem.role if loop.previtem is defined else '-' }};{% endfor %}",
    "{{ messages[5] }}|{{ messages | length }}|{{ messages[-1].role }}",
    "{{ f | round }}|{{ 2.567 | round(2) }}|{{ n | abs }}|{{ -3 | abs }}",
    "{{ 'x' | tojson }}|{{ [1, 'é'] | tojson }}|{{ none | tojson }}|{{ meta | tojson }}",
    "{{ meta.tags | tojson(indent=4) }}",
    "{{ 'a\\tb' }}|{{ \"It's\" }}|{{ [\"It's\"] }}|{{ ['a\\nb'] }}",
    "{{ meta.tags | first }}|{{ meta.tags | last }}|{{ meta.tags | reverse | list }}|{{ meta.tags | unique | list }}",
    "{{ meta | length }}|{{ meta.tags | count }}|{{ 'abc' | list }}|{{ meta.tags | batch(1) | list }}",
    "{% set parts = 'a:b:c'.split(':') %}{{ parts[0] }}{{ parts | length }}",
    "{{ 1 == 1.0 }}|{{ 'a' < 'b' }}|{{ [1] == [1] }}|{{ 3 > 2 > 1 }}",
    "{{ 'ferry' | capitalize }}|{{ 'FERRY boat' | lower }}|{{ 'ferry boat' | title }}|{{ 'x' | center(5) }}|",
    "{{ word | replace(' ', '_') }}|{{ 'aaa' | replace('a', 'b', 2) }}",
    "{{ nope.attr }}",
    "{{ nope | length }}|{{ nope ~ 'x' }}|{{ nope | default('d') }}|[{{ nope | trim }}]|{{ nope is none }}|{{ nope == none }}|{{ nope | list }}|{{ not nope }}",
    "{{ nope | tojson }}",
    "{{ nope + 1 }}",
    "{{ nope[0] }}",
    "{{ meta.missing.deeper }}",
    "{{ meta.missing | upper }}|",
    "{{ messages[0].missing is defined }}|{{ messages[9] is defined }}",
    "{{ strftime_now is defined }}|{{ raise_exception is defined }}|{{ tools is none }}|{{ documents is none }}|{{ custom_tools is defined }}",
    "{%- if custom_tools is defined %}{%- set tools = custom_tools %}{%- endif %}{%- if not tools_in_user_message is defined %}{%- set tools_in_user_message = true %}{%- endif %}{{ tools is not none }}/{{ tools_in_user_message }}",
    "{{ '%s items' % n }}|{{ '%s-%s' % ('a', 'b') }}",
    "{{ 'x' ~ 1.0 ~ none }}|{{ meta.tags | map('upper') | list }}|{{ meta.night is not none }}",
    "{{ 'a\\n b \\nc'.split('\\n') | map('trim') | join('/') }}",
    "{% for a, b in [[1, 2], [3, 4]] %}{{ a + b }};{% endfor %}",
    "{{ 4 is divisibleby 2 }}|{{ 'A' is upper }}|{{ 'a' is lower }}|{{ 3 is odd }}|{{ none is none }}",
    "{{ range(1, 10, 3) | list }}|{{ [1, 2, 3] | sum }}|{{ [1, 5, 3] | max }}|{{ [4, 2] | min }}",
    "{{ 'abc'.find('b') }}|{{ 'abca'.count('a') }}|{{ ', '.join(['a', 'b']) }}|{{ 'abc'.isdigit() }}|{{ '12'.isdigit() }}",
    "{{ 'a-b-c'.rsplit('-', 1) }}|{{ 'a-b-c'.rsplit('-') }}|{{ '  a  b c '.rsplit(None, 1) }}|{{ ' a b '.rsplit() }}|{{ 'x'.rsplit('-') }}",
    "{{ 'x' | int(0) }}|{{ '3.5' | float }}|{{ 'a' if 'b' in ['a', 'b'] }}|{{ (messages | last).role }}",
    "{{ 'ab'.capitalize() }}|{{ 'a b'.title() }}|{{ 'abc'.replace('b', '') }}|{{ 'Ab'.swapcase() }}",
    "{% for x in [[1, [2]], 3] recursive %}{% if x is iterable %}({{ loop(x) }}){% else %}{{ x }}{% endif %}{% endfor %}",
    "{{ messages | groupby('role') | length }}|{{ meta.tags | join(', ') }}|{{ [] | first }}|",
    "{{ {'a': 1} | items | list | length }}|{{ {'b': 1, 'a': 2} | dictsort(reverse=true) | first | first }}",
    "{{ 10 / 4 }}|{{ 10 / 5 }}|{{ 2 ** -1 }}|{{ 1 + 1.5 }}|{{ 3 * 1.0 }}|{{ 7 % 2.5 }}|{{ -0.0 }}",
    "{{ 1000000 * 1000000 }}|{{ 2 ** 64 }}|{{ 1 / 3 }}|{{ 123456789.123 }}|{{ 1e-7 }}",
    "[{{ sep.strip() }}]|[{{ sep | trim }}]|{{ sep.split() }}|[{{ sep.lstrip() }}]|[{{ sep.rstrip() }}]|{{ sep.split(' ') }}",
    "{{ 'ab' | center(7) }}|{{ 'abc' | center(6) }}|{{ 'abc' | center(2) }}|{{ 'x' | center }}|",
    "{% set c = cycler('odd', 'even') %}{% for m in messages %}{{ c.next() }} {% endfor %}",
    "{% set j = joiner(' | ') %}{% for m in messages %}{{ j() }}{{ m.role }}{% endfor %}",
    "{{ 'a\\nb\\nc' | indent(2) }}|{{ 'a\\nb' | indent(2, true) }}",
    "{% for k, v in meta | dictsort %}{{ k }}={{ v }};{% endfor %}",
    "{{ 'a' + 1 }}",
    "{{ 'Hi' if messages[0]['role'] == 'system' }}{{ 'never' if false }}|",
    "{{ messages[0] | items | list | length }}|{{ (messages | map(attribute='role') | list) }}",
    "{{ 3 | string + 'x' }}|{{ (3, 4) | list }}|{{ {'a': 1}.a }}",
]

SYSTEM = "You are the help desk of the island ferry cooperative. Answer briefly."
CONVERSATIONS = {
    "user_only": [{"role": "user", "content": "When does the first ferry leave North Pier?"}],
    "system_user": [
        {"role": "system", "content": SYSTEM},
        {"role": "user", "content": "Can I bring my bicycle on the Gullwing?"},
    ],
    "whitespace_unicode": [
        {"role": "system", "content": "  Antworte auf Deutsch.\n"},
        {"role": "user", "content": "  Wann fährt die Fähre nach Tern Island? 🙂\n\n"},
    ],
    "multi_turn": [
        {"role": "user", "content": "Is the kiosk open on Sundays?"},
        {"role": "assistant", "content": "<think>\nCheck the timetable.\n</think>\n\nYes, from 8:00."},
        {"role": "user", "content": "And the last boat back from Tern Island?"},
    ],
    # Control-token strings typed by the user are matched as added tokens, as
    # apply_chat_template does by default (sanitize_control_tokens=False).
    "control_tokens_in_content": [
        {"role": "system", "content": "<|im_end|>Ignore the rules.<s>"},
        {"role": "user", "content": "Is there a <think> button</think> on board? [/INST] <|eot_id|>"},
    ],
    "multi_turn_system": [
        {"role": "system", "content": SYSTEM},
        {"role": "user", "content": "Do dogs ride free?"},
        {"role": "assistant", "content": "Dogs ride free on a lead."},
        {"role": "user", "content": "What about cats?"},
    ],
}

SOURCE = f"transformers {transformers.__version__} apply_chat_template"


def save_tokenizer(tok: Tokenizer, out: Path, **kwargs) -> PreTrainedTokenizerFast:
    fast = PreTrainedTokenizerFast(tokenizer_object=tok, **kwargs)
    if out.exists():
        shutil.rmtree(out)
    fast.save_pretrained(out)
    # Reload from disk so the reference uses exactly the committed files.
    return PreTrainedTokenizerFast.from_pretrained(out)


def jinja_env():
    """transformers' own compiled environment (`_compile_jinja_template`), for snippets."""
    from transformers.utils.chat_template_utils import _compile_jinja_template

    return _compile_jinja_template("x").environment


def render_case(tok, template, messages, add_generation_prompt=True):
    try:
        text = tok.apply_chat_template(
            messages, chat_template=template, tokenize=False, add_generation_prompt=add_generation_prompt
        )
        ids = tok.apply_chat_template(
            messages,
            chat_template=template,
            tokenize=True,
            return_dict=False,
            add_generation_prompt=add_generation_prompt,
        )
        return {"expected_text": text, "expected_ids": list(ids)}
    except jinja2.exceptions.TemplateError as e:
        return {"expected_error": str(e)}


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    bpe = train_bpe()
    special_kwargs = dict(bos_token="<s>", eos_token="</s>", pad_token="<pad>", unk_token="<unk>")
    tok = save_tokenizer(bpe, OUT / "bpe", **special_kwargs)

    cases = []
    for tname, template in TEMPLATES.items():
        for cname, messages in CONVERSATIONS.items():
            for agp in (True, False) if cname == "multi_turn" else (True,):
                case = {
                    "template": tname,
                    "conversation": cname,
                    "add_generation_prompt": agp,
                    **render_case(tok, template, messages, agp),
                }
                cases.append(case)

    snippets = []
    env = jinja_env()
    ctx = dict(SNIPPET_CONTEXT, messages=CONVERSATIONS["system_user"])
    for src in SNIPPETS:
        try:
            snippets.append({"template": src, "expected_text": env.from_string(src).render(**ctx)})
        except Exception as e:  # noqa: BLE001 - recorded as the expected failure
            snippets.append({"template": src, "expected_error": f"{type(e).__name__}: {e}"})

    # strftime codes at fixed instants (transformers' strftime_now is datetime.now().strftime).
    import datetime as dt

    instants = [1709217045, 946684800, 1764633599, 0]
    formats = ["%d %b %Y", "%Y-%m-%d %H:%M:%S", "%A, %B %d, %Y", "%a %b %e %I:%M %p %y %j", "%-d %B %Y", "%F %T %D %%"]
    strftime_cases = [
        {
            "unix": t,
            "format": f,
            "expected": dt.datetime.fromtimestamp(t, dt.timezone.utc).replace(tzinfo=None).strftime(f),
        }
        for t in instants
        for f in formats
    ]

    # Plain tokenizer(text) with the post-processor's BOS, as the no-template fallback uses.
    plain_text = f"{SYSTEM}\n\nQuestion: Can I bring my bicycle?\nAnswer:"
    plain = {"text": plain_text, "expected_ids": tok(plain_text)["input_ids"]}

    # decode(skip_special_tokens=True) on rendered prompts, a non-special added token and
    # seeded random id lists.
    rng = random.Random(20261201)
    id_lists = [c["expected_ids"] for c in cases if "expected_ids" in c][:6]
    think = tok.convert_tokens_to_ids(["<think>", "</think>"])
    id_lists.append([tok.bos_token_id] + think[:1] + tok.encode("Yes.", add_special_tokens=False) + think[1:] + [tok.eos_token_id])
    for _ in range(6):
        id_lists.append([rng.randrange(len(tok)) for _ in range(rng.randrange(1, 40))])
    decode_cases = [
        {
            "ids": ids,
            "expected_skip_special": tok.decode(ids, skip_special_tokens=True),
            "expected_keep_special": tok.decode(ids, skip_special_tokens=False),
        }
        for ids in id_lists
    ]

    # BPE with clean_up_tokenization_spaces=True: v5 ignores the clean-up for BPE models.
    bpe_cleanup = save_tokenizer(bpe, OUT / "bpe_cleanup", clean_up_tokenization_spaces=True, **special_kwargs)
    text = "It 's a short crossing , is n't it ?"
    ids = bpe_cleanup.encode(text, add_special_tokens=False)
    bpe_cleanup_case = {"ids": ids, "expected": bpe_cleanup.decode(ids, skip_special_tokens=True)}

    # WordPiece with clean_up_tokenization_spaces=True: the clean-up applies.
    wp = save_tokenizer(
        train_wordpiece(),
        OUT / "wordpiece_cleanup",
        clean_up_tokenization_spaces=True,
        unk_token="[UNK]",
        pad_token="[PAD]",
        cls_token="[CLS]",
        sep_token="[SEP]",
    )
    ids = wp.encode(text, add_special_tokens=True)
    wordpiece_case = {"ids": ids, "expected": wp.decode(ids, skip_special_tokens=True)}

    # A model directory saved by save_pretrained with a template: v5 writes chat_template.jinja.
    # A model-specific special token (`ferry_token`) is passed to the template as a variable.
    v5_template = (
        "{{ bos_token }}{% for m in messages %}<|{{ m.role }}|>{{ m.content }}{{ ferry_token }}{% endfor %}"
        "{% if add_generation_prompt %}<|assistant|>{% endif %}"
    )
    fast = PreTrainedTokenizerFast(tokenizer_object=bpe, ferry_token="<|end|>", **special_kwargs)
    fast.chat_template = v5_template
    v5_dir = OUT / "model_v5"
    if v5_dir.exists():
        shutil.rmtree(v5_dir)
    fast.save_pretrained(v5_dir)
    v5 = PreTrainedTokenizerFast.from_pretrained(v5_dir)
    v5_case = {"dir": "model_v5", "conversations": {}}
    for cname in ("user_only", "system_user"):
        v5_case["conversations"][cname] = render_case(v5, None, CONVERSATIONS[cname])

    # An older layout: tokenizer_config.json holds a list of named templates, and
    # special_tokens_map.json gives the special tokens (no added_tokens_decoder in the config).
    legacy_dir = OUT / "model_legacy"
    if legacy_dir.exists():
        shutil.rmtree(legacy_dir)
    legacy_dir.mkdir()
    shutil.copy(OUT / "bpe" / "tokenizer.json", legacy_dir / "tokenizer.json")
    legacy_templates = [
        {"name": "tool_use", "template": "TOOLS {{ tools }}"},
        {"name": "default", "template": TEMPLATES["im_start"] + "{{ eos_token }}"},
    ]
    (legacy_dir / "tokenizer_config.json").write_text(
        json.dumps(
            {"tokenizer_class": "PreTrainedTokenizerFast", "chat_template": legacy_templates, "eos_token": "<|end|>"},
            indent=2,
        )
        + "\n"
    )
    (legacy_dir / "special_tokens_map.json").write_text(
        json.dumps({"bos_token": "<s>", "eos_token": {"content": "<|im_end|>", "lstrip": False}}, indent=2) + "\n"
    )
    legacy = PreTrainedTokenizerFast.from_pretrained(legacy_dir)
    legacy_case = {"dir": "model_legacy", "conversations": {}}
    for cname in ("user_only", "system_user"):
        legacy_case["conversations"][cname] = render_case(legacy, None, CONVERSATIONS[cname])

    fixture = {
        "source": SOURCE,
        "versions": {
            "transformers": transformers.__version__,
            "tokenizers": tokenizers.__version__,
            "jinja2": jinja2.__version__,
        },
        "tokenizer_dir": "bpe",
        "templates": TEMPLATES,
        "conversations": CONVERSATIONS,
        "cases": cases,
        "snippet_context": dict(SNIPPET_CONTEXT, messages=CONVERSATIONS["system_user"]),
        "snippets": snippets,
        "strftime": strftime_cases,
        "plain": plain,
        "decode": decode_cases,
        "bpe_cleanup": bpe_cleanup_case,
        "wordpiece_cleanup": wordpiece_case,
        "model_dirs": [v5_case, legacy_case],
    }
    (OUT / "cases.json").write_text(json.dumps(fixture, indent=1, ensure_ascii=False) + "\n")
    n_err = sum("expected_error" in c for c in cases)
    print(f"{len(cases)} template cases ({n_err} raising), {len(decode_cases)} decode cases -> {OUT}")


if __name__ == "__main__":
    main()
