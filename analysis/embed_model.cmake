# embed_model.cmake: writes a model file as a NUL-terminated C array (cmake -DIN=... -DOUT=...
# -DNAME=... -P embed_model.cmake), so that the built-in model is the file itself.
file(READ "${IN}" hex HEX)
string(REGEX REPLACE "([0-9a-f][0-9a-f])" "0x\\1," bytes "${hex}")
string(REGEX REPLACE "(0x..,0x..,0x..,0x..,0x..,0x..,0x..,0x..,0x..,0x..,0x..,0x..,)" "\\1\n    "
  bytes "${bytes}")
# -DSYMBOL=... names the array (default an_model_large_text, the built-in model).
if(NOT SYMBOL)
  set(SYMBOL an_model_large_text)
endif()
file(WRITE "${OUT}.tmp" "/* Generated from ${NAME} at build time (analysis/embed_model.cmake): do not edit. */\n"
  "const char ${SYMBOL}[] = {\n    ${bytes}0x00};\n")
# Replace only when changed, so that a rebuild does not recompile it needlessly.
file(COPY_FILE "${OUT}.tmp" "${OUT}" ONLY_IF_DIFFERENT)
file(REMOVE "${OUT}.tmp")
