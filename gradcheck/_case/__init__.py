"""Networks written in any language: the language-neutral network description and the forward loss
rebuilt from it (``network``), and the ``.npz`` case file format (``file``)."""
