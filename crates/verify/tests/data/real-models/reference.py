#!/usr/bin/env python3
"""Writes reference.json: what the reference libraries read from the model files in this folder.

Run with the packages the fixtures came from (README.md names each file's source):

    python3 -m venv /tmp/ref && /tmp/ref/bin/pip install onnx==1.23.2 onnxruntime==1.32.0 \
        safetensors==0.8.0 numpy==2.4.6
    /tmp/ref/bin/pip download --no-deps rapidocr-onnxruntime==1.4.4 -d /tmp/ref-wheels
    /tmp/ref/bin/python reference.py /tmp/ref-wheels/rapidocr_onnxruntime-1.4.4-py3-none-any.whl

It also writes the files it derives: subgraphs.onnx (a model it builds with onnx.helper, since
no package we found ships a small model with subgraphs), classifier.safetensors (written with
the safetensors package, for the same reason) and rapidocr_onnxruntime-1.4.4-rec-labels.txt
(the OCR recognizer's label list, from its model's metadata). The Rust tests
(crates/verify/tests/real_models.rs) compare ampoule's readers with reference.json in every CI
run, without any of these packages.
"""

import ast
import json
import os
import sys
import zipfile

import numpy
import onnx
import onnxruntime
import safetensors
from onnx import helper, numpy_helper, TensorProto
from safetensors.numpy import save_file

HERE = os.path.dirname(os.path.abspath(__file__))
ONNX_DATA = os.path.join(os.path.dirname(onnx.__file__), "backend", "test", "data")
RAPIDOCR = "rapidocr_onnxruntime-1.4.4"


def dim_of(dim):
    """A dimension as onnx holds it: its value (-1 included), its name, or None when unset."""
    if dim.HasField("dim_value"):
        return dim.dim_value
    if dim.HasField("dim_param"):
        return dim.dim_param
    return None


def value_of(info):
    kind = info.type.WhichOneof("value")
    out = {"name": info.name, "kind": kind}
    if kind == "tensor_type":
        tensor = info.type.tensor_type
        out["elem_type"] = tensor.elem_type
        out["shape"] = (
            [dim_of(d) for d in tensor.shape.dim] if tensor.HasField("shape") else None
        )
    return out


def weights_of(graph, totals, depth=0):
    """Initializers, Constant nodes' `value` tensors, and the same in every subgraph."""
    tensors = list(graph.initializer)
    for node in graph.node:
        for attr in node.attribute:
            if node.op_type == "Constant" and node.domain in ("", "ai.onnx") and attr.name == "value":
                tensors.append(attr.t)
            for sub in [attr.g] if attr.type == onnx.AttributeProto.GRAPH else list(attr.graphs):
                weights_of(sub, totals, depth + 1)
    for tensor in tensors:
        array = numpy_helper.to_array(tensor)
        totals["weight_tensors"] += 1
        totals["parameters"] += int(array.size)
        key = str(tensor.data_type)
        totals["bytes_by_type"][key] = totals["bytes_by_type"].get(key, 0) + int(array.nbytes)


def ort_values(values):
    return [{"name": v.name, "type": v.type, "shape": v.shape} for v in values]


def onnx_reference(path, classes):
    model = onnx.load(path)
    onnx.checker.check_model(model)
    graph = model.graph
    initializers = {t.name for t in graph.initializer}
    totals = {"weight_tensors": 0, "parameters": 0, "bytes_by_type": {}}
    weights_of(graph, totals)
    opset = [o.version for o in model.opset_import if o.domain in ("", "ai.onnx")]
    options = onnxruntime.SessionOptions()
    options.log_severity_level = 3
    try:
        session = onnxruntime.InferenceSession(path, options, providers=["CPUExecutionProvider"])
        runtime = {"inputs": ort_values(session.get_inputs()),
                   "outputs": ort_values(session.get_outputs())}
    except Exception as e:  # an old operator set onnxruntime no longer implements
        runtime = {"refused": str(e).splitlines()[0]}
    return {
        "onnx": {
            "ir_version": model.ir_version,
            "opset": opset[0] if opset else None,
            "producer_name": model.producer_name if model.HasField("producer_name") else None,
            "producer_version": (
                model.producer_version if model.HasField("producer_version") else None
            ),
            "inputs": [value_of(v) for v in graph.input if v.name not in initializers],
            "outputs": [value_of(v) for v in graph.output],
            **totals,
        },
        "onnxruntime": runtime,
        "classes": classes,
    }


def expected_output_shape(case):
    """The shape of the expected output that onnx's backend test ships beside a light model."""
    tensor = onnx.TensorProto()
    with open(os.path.join(ONNX_DATA, "light", f"light_{case}_output_0.pb"), "rb") as f:
        tensor.ParseFromString(f.read())
    return list(tensor.dims)


def build_subgraphs(path):
    """An If whose branches hold Constants and an initializer, one branch nesting a Loop."""
    def const(name, values):
        array = numpy.array(values, dtype=numpy.float32)
        return helper.make_node("Constant", [], [name], value=numpy_helper.from_array(array))

    loop_body = helper.make_graph(
        [const("step", [[0.5, 0.5, 0.5]]), helper.make_node("Add", ["acc_in", "step"], ["acc_out"]),
         helper.make_node("Identity", ["cond_in"], ["cond_out"])],
        "loop_body",
        [helper.make_tensor_value_info("i", TensorProto.INT64, []),
         helper.make_tensor_value_info("cond_in", TensorProto.BOOL, []),
         helper.make_tensor_value_info("acc_in", TensorProto.FLOAT, [1, 3])],
        [helper.make_tensor_value_info("cond_out", TensorProto.BOOL, []),
         helper.make_tensor_value_info("acc_out", TensorProto.FLOAT, [1, 3])],
    )
    then_branch = helper.make_graph(
        [const("bias", [[1.0, 2.0, 3.0]]),
         helper.make_node("MatMul", ["x", "w_then"], ["mm"]),
         helper.make_node("Add", ["mm", "bias"], ["then_out"])],
        "then_branch", [], [helper.make_tensor_value_info("then_out", TensorProto.FLOAT, [-1, 3])],
        initializer=[numpy_helper.from_array(numpy.ones((4, 3), dtype=numpy.float32), "w_then")],
    )
    else_branch = helper.make_graph(
        [const("start", [[0.0, 0.0, 0.0]]),
         helper.make_node("Constant", [], ["trips"], value=numpy_helper.from_array(numpy.array(2, dtype=numpy.int64))),
         helper.make_node("Loop", ["trips", "cond", "start"], ["else_out"], body=loop_body)],
        "else_branch", [], [helper.make_tensor_value_info("else_out", TensorProto.FLOAT, [-1, 3])],
    )
    graph = helper.make_graph(
        [helper.make_node("If", ["cond"], ["scores"], then_branch=then_branch, else_branch=else_branch)],
        "trailcam_subgraphs",
        [helper.make_tensor_value_info("cond", TensorProto.BOOL, []),
         helper.make_tensor_value_info("x", TensorProto.FLOAT, [-1, 4])],
        [helper.make_tensor_value_info("scores", TensorProto.FLOAT, [-1, 3])],
    )
    model = helper.make_model(graph, producer_name="trailcam-reference", producer_version="1.0",
                              opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 8
    onnx.save(model, path)


def safetensors_reference(path):
    tensors = {}
    with safetensors.safe_open(path, framework="np") as f:
        for name in f.keys():
            array = f.get_tensor(name)
            tensors[name] = {"dtype": str(array.dtype), "shape": list(array.shape)}
    return {"safetensors": {"tensors": tensors}}


def main():
    if len(sys.argv) != 2:
        sys.exit(__doc__)
    with zipfile.ZipFile(sys.argv[1]) as wheel:
        models = "rapidocr_onnxruntime/models/"
        config = wheel.read("rapidocr_onnxruntime/config.yaml").decode()
        rec = onnx.load_from_string(wheel.read(models + "ch_PP-OCRv4_rec_infer.onnx"))
        det = onnx.load_from_string(wheel.read(models + "ch_PP-OCRv4_det_infer.onnx"))
    view = onnx.load(os.path.join(ONNX_DATA, "pytorch-operator", "test_operator_view", "model.onnx"))
    # config.yaml's "label_list: ['0', '180']" under Cls, read without a YAML parser.
    label_list = ast.literal_eval(config.split("label_list:")[1].splitlines()[0].strip())
    character = next(p.value for p in rec.metadata_props if p.key == "character")
    # rapidocr 1.4.4 ch_ppocr_rec/utils.py get_character: "blank" first, " " last.
    rec_labels = ["blank"] + character.splitlines() + [" "]
    with open(os.path.join(HERE, f"{RAPIDOCR}-rec-labels.txt"), "w", encoding="utf-8", newline="\n") as f:
        f.write("".join(label + "\n" for label in rec_labels))

    build_subgraphs(os.path.join(HERE, "subgraphs.onnx"))
    rng = numpy.random.default_rng(11)
    save_file({"backbone.weight": rng.standard_normal((8, 12)).astype(numpy.float32),
               "head.bias": numpy.zeros(7, dtype=numpy.float32),
               "head.weight": rng.standard_normal((7, 8)).astype(numpy.float16)},
              os.path.join(HERE, "classifier.safetensors"))

    reference = {
        "source": (f"onnx {onnx.__version__}, onnxruntime {onnxruntime.__version__}, "
                   f"safetensors {safetensors.__version__}, numpy {numpy.__version__}; "
                   f"{RAPIDOCR} (wheel)"),
        "models": {
            "onnx-1.23.2-light_squeezenet.onnx": onnx_reference(
                os.path.join(HERE, "onnx-1.23.2-light_squeezenet.onnx"),
                {"output": "softmaxout_1", "shape": expected_output_shape("squeezenet"),
                 "from": "onnx backend test light_squeezenet_output_0.pb (the expected output)"}),
            "onnx-1.23.2-light_bvlc_alexnet.onnx": onnx_reference(
                os.path.join(HERE, "onnx-1.23.2-light_bvlc_alexnet.onnx"),
                {"output": "prob_1", "shape": expected_output_shape("bvlc_alexnet"),
                 "from": "onnx backend test light_bvlc_alexnet_output_0.pb (the expected output)"}),
            "onnx-1.23.2-test_operator_mm.onnx": onnx_reference(
                os.path.join(HERE, "onnx-1.23.2-test_operator_mm.onnx"), None),
            "onnxruntime-1.32.0-logreg_iris.onnx": onnx_reference(
                os.path.join(HERE, "onnxruntime-1.32.0-logreg_iris.onnx"), None),
            "onnxruntime-1.32.0-sigmoid.onnx": onnx_reference(
                os.path.join(HERE, "onnxruntime-1.32.0-sigmoid.onnx"), None),
            f"{RAPIDOCR}-ch_ppocr_mobile_v2.0_cls_infer.onnx": onnx_reference(
                os.path.join(HERE, f"{RAPIDOCR}-ch_ppocr_mobile_v2.0_cls_infer.onnx"),
                {"output": "save_infer_model/scale_0.tmp_1", "count": len(label_list),
                 "from": f"{RAPIDOCR} config.yaml Cls label_list {label_list}"}),
            "subgraphs.onnx": onnx_reference(os.path.join(HERE, "subgraphs.onnx"), None),
            "classifier.safetensors": {
                **safetensors_reference(os.path.join(HERE, "classifier.safetensors")),
                "classes": {"output": "head.bias", "count": 7, "from": "written by reference.py"},
            },
        },
        # Issue 11 item 1's shapes, each the output of a model file inside a package, with the
        # class count its package states (null: the output is not a list of class scores).
        "class_shapes": [
            {"source": "onnx 1.23.2 light_bvlc_alexnet.onnx, output prob_1",
             "shape": value_of(onnx.load(os.path.join(HERE, "onnx-1.23.2-light_bvlc_alexnet.onnx")).graph.output[0])["shape"],
             "classes": expected_output_shape("bvlc_alexnet")[1],
             "classes_from": "the expected output light_bvlc_alexnet_output_0.pb"},
            {"source": "onnx 1.23.2 light_squeezenet.onnx, output softmaxout_1",
             "shape": value_of(onnx.load(os.path.join(HERE, "onnx-1.23.2-light_squeezenet.onnx")).graph.output[0])["shape"],
             "classes": expected_output_shape("squeezenet")[1],
             "classes_from": "the expected output light_squeezenet_output_0.pb"},
            {"source": f"{RAPIDOCR} ch_PP-OCRv4_rec_infer.onnx, output {rec.graph.output[0].name}",
             "shape": value_of(rec.graph.output[0])["shape"],
             "classes": len(rec_labels),
             "classes_from": "ch_ppocr_rec/utils.py: 'blank', the 'character' metadata, ' '"},
            {"source": "onnx 1.23.2 pytorch-operator/test_operator_view/model.onnx, output "
                       f"{view.graph.output[0].name}",
             "shape": value_of(view.graph.output[0])["shape"],
             "classes": 1,
             "classes_from": "one score per row (a [batch, 1] output with a fixed batch; no "
                             "package we searched ships a small voice-activity model)"},
            {"source": f"{RAPIDOCR} ch_PP-OCRv4_det_infer.onnx, output {det.graph.output[0].name}",
             "shape": value_of(det.graph.output[0])["shape"],
             "classes": None,
             "classes_from": "a text-probability map [N, 1, H, W] (rapidocr ch_ppocr_det), "
                             "not class scores"},
        ],
        "ocr_recognizer": {
            "file": f"{RAPIDOCR} rapidocr_onnxruntime/models/ch_PP-OCRv4_rec_infer.onnx "
                    "(10.9 MB, not committed)",
            "outputs": [value_of(v) for v in rec.graph.output],
            "labels": len(rec_labels),
            "labels_from": f"{RAPIDOCR} ch_ppocr_rec/utils.py get_character: 'blank', the "
                           "model's 'character' metadata lines, ' '",
        },
    }
    with open(os.path.join(HERE, "reference.json"), "w") as f:
        json.dump(reference, f, indent=1, sort_keys=True, ensure_ascii=False)
        f.write("\n")


if __name__ == "__main__":
    main()
