"""How the embedded demo model is made: message generator, tokenizer trainer, training run.

Not part of the installed package: the program only reads the finished folder
``viewer/demo/model``. ``python -m scripts.demo.build`` rebuilds it from a checkout.
"""
