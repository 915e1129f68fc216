"""Conversion of models trained elsewhere (PyTorch state_dicts, safetensors) into danpack's float model folder."""
