"""What several stages share about texels and photos: bilinear sampling, which texels a view sees
(visibility, usable and scored pixels), footprints and texture sizes, gutter filling and the
weighted per-texel average. Below every stage that uses it: it imports only the scene and the
G-buffers."""
