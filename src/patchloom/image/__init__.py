"""One image's chain: decode, sizing, augmentation, patches, token dropping and patch ops."""
