"""Writing one GGUF file from another with the `gguf` package: its metadata (keys left out or
added by the caller) and its tensors unchanged. Used by make_gguf_tokenizer_fixtures.py and
bench/peer/gguf_with_tokenizer.py."""

from pathlib import Path

import gguf


def writer_from(src: Path, dst: Path, skip=lambda name: False):
    """A reader of `src` and a writer of `dst` holding `src`'s metadata, its architecture kept,
    without the keys `skip` names (nor the `GGUF.*` header fields, which the writer makes)."""
    reader = gguf.GGUFReader(str(src))
    writer = gguf.GGUFWriter(str(dst), reader.fields["general.architecture"].contents())
    for field in reader.fields.values():
        if field.name == gguf.Keys.General.ARCHITECTURE or field.name.startswith("GGUF."):
            continue
        if skip(field.name):
            continue
        val_type = field.types[0]
        sub_type = field.types[-1] if val_type == gguf.GGUFValueType.ARRAY else None
        writer.add_key_value(field.name, field.contents(), val_type, sub_type=sub_type)
    return reader, writer


def copy_tensors_and_close(reader, writer, tensors=True):
    """Writes the header and metadata gathered in `writer`, then `reader`'s tensors unchanged
    (none when `tensors` is false)."""
    tensors = reader.tensors if tensors else []
    for tensor in tensors:
        writer.add_tensor_info(tensor.name, tensor.data.shape, tensor.data.dtype, tensor.data.nbytes,
                               tensor.tensor_type)
    writer.write_header_to_file()
    writer.write_kv_data_to_file()
    writer.write_ti_data_to_file()
    for tensor in tensors:
        writer.write_tensor_data(tensor.data, tensor_endianess=reader.endianess)
    writer.close()
