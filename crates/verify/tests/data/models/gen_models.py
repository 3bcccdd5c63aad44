#!/usr/bin/env python3
"""Builds the model fixtures for crates/verify/tests/model_readers.rs with the reference libraries,
and writes beside each file what those libraries report about it.

Reference libraries (PyPI): onnx 1.23 (with its protobuf runtime), safetensors 0.8, numpy 2.4.
Install with `pip install onnx safetensors numpy`, then run this script from any directory:
it rewrites the fixtures in its own folder. The models are invented: a tiny trail-camera species
classifier (fox, roe deer, wild boar, badger, hare, red squirrel, empty frame). Weights are tiny
and seeded, so each file is a few hundred bytes and the output is the same on every run.
"""

import json
import os

import numpy as np
import onnx
import safetensors
from onnx import TensorProto, helper, numpy_helper
from safetensors import safe_open
from safetensors.numpy import save_file

HERE = os.path.dirname(os.path.abspath(__file__))
RNG = np.random.RandomState(6)
CLASSES = 7  # fox, roe deer, wild boar, badger, hare, red squirrel, empty frame
CHANNELS = 4


def weights(shape, dtype=np.float32):
    if np.issubdtype(dtype, np.integer):
        return RNG.randint(-100, 100, size=shape).astype(dtype)
    return (RNG.standard_normal(shape) * 0.1).astype(dtype)


def head_nodes(conv_w, conv_b, fc_w, fc_b, image):
    """Conv -> global average pool -> flatten -> dense -> softmax, the shared classifier."""
    return [
        helper.make_node("Conv", [image, conv_w, conv_b], ["features"], kernel_shape=[3, 3], pads=[1, 1, 1, 1]),
        helper.make_node("GlobalAveragePool", ["features"], ["pooled"]),
        helper.make_node("Flatten", ["pooled"], ["flat"], axis=1),
        helper.make_node("Gemm", ["flat", fc_w, fc_b], ["logits"], transB=1),
        helper.make_node("Softmax", ["logits"], ["species"], axis=1),
    ]


def float_model():
    inits = [
        numpy_helper.from_array(weights((CHANNELS, 3, 3, 3)), "conv.weight"),
        numpy_helper.from_array(weights((CHANNELS,)), "conv.bias"),
        numpy_helper.from_array(weights((CLASSES, CHANNELS)), "fc.weight"),
        numpy_helper.from_array(weights((CLASSES,)), "fc.bias"),
    ]
    graph = helper.make_graph(
        head_nodes("conv.weight", "conv.bias", "fc.weight", "fc.bias", "image"),
        "trailcam_species",
        [helper.make_tensor_value_info("image", TensorProto.FLOAT, ["N", 3, 96, 96])],
        [helper.make_tensor_value_info("species", TensorProto.FLOAT, ["N", CLASSES])],
        initializer=inits,
    )
    return helper.make_model(
        graph,
        producer_name="trailcam-export",
        producer_version="1.0",
        opset_imports=[helper.make_opsetid("", 13)],
        ir_version=8,
    )


def int8_model():
    """8-bit weights dequantized in the graph, and an 8-bit image the app must feed."""
    inits = [
        numpy_helper.from_array(weights((CHANNELS, 3, 3, 3), np.int8), "conv.weight_q"),
        numpy_helper.from_array(np.array(0.01, dtype=np.float32), "conv.weight_scale"),
        numpy_helper.from_array(np.array(0, dtype=np.int8), "conv.weight_zero"),
        numpy_helper.from_array(weights((CHANNELS,)), "conv.bias"),
        numpy_helper.from_array(weights((CLASSES, CHANNELS), np.int8), "fc.weight_q"),
        numpy_helper.from_array(np.array(0.02, dtype=np.float32), "fc.weight_scale"),
        numpy_helper.from_array(np.array(0, dtype=np.int8), "fc.weight_zero"),
        numpy_helper.from_array(weights((CLASSES,)), "fc.bias"),
    ]
    nodes = [
        helper.make_node("Cast", ["image"], ["image_f"], to=TensorProto.FLOAT),
        helper.make_node("DequantizeLinear", ["conv.weight_q", "conv.weight_scale", "conv.weight_zero"], ["conv.weight"]),
        helper.make_node("DequantizeLinear", ["fc.weight_q", "fc.weight_scale", "fc.weight_zero"], ["fc.weight"]),
    ] + head_nodes("conv.weight", "conv.bias", "fc.weight", "fc.bias", "image_f")
    graph = helper.make_graph(
        nodes,
        "trailcam_species_int8",
        [helper.make_tensor_value_info("image", TensorProto.UINT8, ["N", 3, 96, 96])],
        [helper.make_tensor_value_info("species", TensorProto.FLOAT, ["N", CLASSES])],
        initializer=inits,
    )
    return helper.make_model(
        graph,
        producer_name="trailcam-quantize",
        producer_version="0.3",
        opset_imports=[helper.make_opsetid("", 13)],
        ir_version=8,
    )


def old_style_model():
    """IR version 3: every initializer is listed as a graph input too; the batch is unknown."""
    inits = [
        numpy_helper.from_array(weights((CHANNELS, 3, 3, 3)), "conv.weight"),
        numpy_helper.from_array(weights((CHANNELS,)), "conv.bias"),
        numpy_helper.from_array(weights((CLASSES, CHANNELS)), "fc.weight"),
        numpy_helper.from_array(weights((CLASSES,)), "fc.bias"),
    ]
    weight_inputs = [
        helper.make_tensor_value_info(t.name, t.data_type, list(t.dims)) for t in inits
    ]
    graph = helper.make_graph(
        head_nodes("conv.weight", "conv.bias", "fc.weight", "fc.bias", "image"),
        "trailcam_species_v3",
        [helper.make_tensor_value_info("image", TensorProto.FLOAT, [None, 3, 96, 96])] + weight_inputs,
        [helper.make_tensor_value_info("species", TensorProto.FLOAT, [None, CLASSES])],
        initializer=inits,
    )
    return helper.make_model(
        graph,
        producer_name="trailcam-export",
        producer_version="0.1",
        opset_imports=[helper.make_opsetid("", 8)],
        ir_version=3,
    )


def shape_of(value_info):
    tensor = value_info.type.tensor_type
    if not tensor.HasField("shape"):
        return None
    dims = []
    for d in tensor.shape.dim:
        if d.HasField("dim_value"):
            dims.append(d.dim_value)
        elif d.HasField("dim_param") and d.dim_param:
            dims.append(d.dim_param)
        else:
            dims.append(None)
    return dims


def onnx_report(path):
    """What the onnx package reads back from the saved file."""
    model = onnx.load(path)
    onnx.checker.check_model(model)
    graph = model.graph
    init_names = {t.name for t in graph.initializer}
    opsets = [o.version for o in model.opset_import if o.domain in ("", "ai.onnx")]

    def values(infos):
        return [
            {
                "name": v.name,
                "elem_type": v.type.tensor_type.elem_type,
                "elem_type_name": TensorProto.DataType.Name(v.type.tensor_type.elem_type),
                "shape": shape_of(v),
            }
            for v in infos
            if v.name not in init_names
        ]

    # Keyed by the TensorProto.DataType code (as a string, for JSON); type_names says which.
    bytes_by_type = {}
    params_by_type = {}
    type_names = {}
    for t in graph.initializer:
        code = str(t.data_type)
        type_names[code] = TensorProto.DataType.Name(t.data_type)
        bytes_by_type[code] = bytes_by_type.get(code, 0) + int(numpy_helper.to_array(t).nbytes)
        params_by_type[code] = params_by_type.get(code, 0) + int(np.prod(t.dims))
    return {
        "source": f"onnx {onnx.__version__} (onnx.load, numpy_helper.to_array; numpy {np.__version__})",
        "ir_version": model.ir_version,
        "opset": opsets[0] if opsets else None,
        "producer_name": model.producer_name,
        "producer_version": model.producer_version,
        "graph_inputs_listed": len(graph.input),
        "inputs": values(graph.input),
        "outputs": values(graph.output),
        "initializer_count": len(graph.initializer),
        "parameter_count": int(sum(int(np.prod(t.dims)) for t in graph.initializer)),
        "parameters_by_type": params_by_type,
        "bytes_by_type": bytes_by_type,
        "type_names": type_names,
    }


def safetensors_report(path):
    """What the safetensors package reads back from the saved file."""
    tensors = {}
    with safe_open(path, framework="np") as f:
        metadata = f.metadata()
        for key in f.keys():
            piece = f.get_slice(key)
            tensors[key] = {
                "dtype": piece.get_dtype(),
                "shape": list(piece.get_shape()),
                "nbytes": int(f.get_tensor(key).nbytes),
            }
    return {
        "source": f"safetensors {safetensors.__version__} (safe_open, framework np; numpy {np.__version__})",
        "metadata": metadata,
        "tensors": tensors,
    }


def write_json(path, report):
    with open(path, "w", encoding="utf-8") as out:
        json.dump(report, out, indent=1, sort_keys=True)
        out.write("\n")


def main():
    for name, model in [
        ("trailcam-f32.onnx", float_model()),
        ("trailcam-int8.onnx", int8_model()),
        ("trailcam-oldstyle.onnx", old_style_model()),
    ]:
        path = os.path.join(HERE, name)
        onnx.save(model, path)
        write_json(path + ".json", onnx_report(path))

    path = os.path.join(HERE, "trailcam-weights.safetensors")
    save_file(
        {
            "conv.weight": weights((CHANNELS, 3, 3, 3)),
            "conv.bias": weights((CHANNELS,)),
            "fc.weight": weights((CLASSES, CHANNELS), np.float16),
            "fc.bias": weights((CLASSES,)),
            "class_mask": np.ones((CLASSES,), dtype=np.uint8),
            "step": np.array(1200, dtype=np.int64),
        },
        path,
        metadata={"species": "fox,roe deer,wild boar,badger,hare,red squirrel,empty frame", "reserve": "north ridge"},
    )
    write_json(path + ".json", safetensors_report(path))

    path = os.path.join(HERE, "trailcam-int8.safetensors")
    save_file(
        {
            "conv.weight_q": weights((CHANNELS, 3, 3, 3), np.int8),
            "conv.weight_scale": np.array([0.01], dtype=np.float32),
            "fc.weight_q": weights((CLASSES, CHANNELS), np.int8),
            "fc.weight_scale": np.array([0.02], dtype=np.float32),
            "fc.bias": weights((CLASSES,), np.int32),
        },
        path,
    )
    write_json(path + ".json", safetensors_report(path))


if __name__ == "__main__":
    main()
