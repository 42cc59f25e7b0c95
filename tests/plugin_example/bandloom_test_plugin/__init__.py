"""A third-party block: multiply a stream by a constant gain."""

from bandloom.blocks.block import Block, Chunk, Param, Port


class Gain(Block):
    type_name = "test-gain"
    summary = "Multiply IQ samples by a constant (plugin test block)."
    parameters = (Param("gain", "float", "the factor", default=2.0, minimum=-100.0, maximum=100.0),)
    inputs = (Port("samples", "samples", "IQ samples"),)
    outputs = (Port("samples", "samples", "the samples times gain"),)

    def output_streams(self, inputs):
        return {"samples": inputs["samples"]}

    def consume(self, port, chunk):
        return {"samples": [Chunk(chunk.data * self.params["gain"], chunk.first_index)]}
