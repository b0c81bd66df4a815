"""Pure-numpy convolutional network: layers, losses, optimizers, model files, training."""
