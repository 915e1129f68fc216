"""danpack: pack a trained deep averaging network (DAN) into one small int8 bundle and run it on a small CPU.

    danpack.runtime      the device side: load a bundle, classify texts (numpy, msgpack; onnxruntime optional)
    danpack.pack         float model -> bundle            danpack.check    bundle vs float original
    danpack.convert      PyTorch / safetensors -> model   danpack.cli      the `danpack` command
    danpack.model, .files, .textfile, .progress           shared by every job
    danpack.models_demo  the invented demo scenario, its trainer and shipped models

Importing `danpack` itself imports nothing else, so a device install never pulls the packer in.
"""

__version__ = "0.1.0"
