#pragma once
// ONNX models as checkpoints: the weights of a model file (graph initializers and the
// tensors of Constant nodes, also inside If / Loop / Scan subgraphs), read in place with
// bounded memory, each with the reduction axes its consumer node implies.
//
// Names: a tensor keeps its name from the file when that name is still free; a later
// tensor of a taken name (the same name in another subgraph) is called
// "<subgraph path>/<name>", the path being one "<node>/<attribute>" step per subgraph
// level, where <node> is the node's name or "<op_type>#<index in its graph>" when it has
// none, and <attribute> is "then_branch", "body", ... or "<attribute>[k]" for the k-th
// graph of a graph list; when that is taken as well, "~2", "~3", ... is appended. The
// file is walked in order: a graph's fields as they come, a node's subgraphs right after
// the node. Tensors with a 0 in their dims are listed with no elements.
#include <cstddef>
#include <memory>
#include <string>

#include "lobit/io/checkpoint.hpp"

namespace lobit::io {

// Throws lobit::Error (usage) naming the file (and the tensor, where known) when the
// file is not a readable ONNX model: corrupt protobuf, inconsistent sizes, element
// types lobit does not read (strings, complex, 4-bit), sparse initializers, external
// data outside the model's folder.
std::unique_ptr<Checkpoint> open_onnx(const std::string& path);

// Whether the first n bytes of a file look like the start of an ONNX ModelProto: an
// ir_version field first (every writer puts it first), then well-formed ModelProto
// fields as far as the bytes go. Cheap; no false positive on safetensors, npy or zip.
bool looks_like_onnx(const unsigned char* head, std::size_t n);

}  // namespace lobit::io
