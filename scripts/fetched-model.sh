# What the model fetch scripts (fetch-base-model.sh, fetch-mpnet.sh) share, sourced by them: the
# check that a model folder is complete with the pinned weights, and the move of a downloaded
# folder into place once its weights check out.

# model_ready DIR SHA256 [FILE...]: DIR holds config.json, tokenizer.json, each FILE, and a
# model.safetensors whose sha256 is SHA256.
model_ready() {
    local dir=$1 sha=$2 f
    shift 2
    for f in config.json tokenizer.json model.safetensors "$@"; do
        [ -f "$dir/$f" ] || return 1
    done
    [ "$(sha256sum "$dir/model.safetensors" | cut -d' ' -f1)" = "$sha" ]
}

# install_model TOOL FROM DEST SHA256: refuses FROM unless its model.safetensors has that sha256,
# else replaces DEST by it (through DEST.partial, so an interrupted move never leaves a DEST that
# looks complete). TOOL names the script in messages.
install_model() {
    local tool=$1 from=$2 dest=$3 sha=$4 got
    got=$(sha256sum "$from/model.safetensors" | cut -d' ' -f1)
    if [ "$got" != "$sha" ]; then
        echo "$tool: model.safetensors has sha256 $got, expected $sha; refusing it" >&2
        return 1
    fi
    mkdir -p "$(dirname "$dest")"
    rm -rf "$dest.partial"
    mv "$from" "$dest.partial"
    rm -rf "$dest"
    mv "$dest.partial" "$dest"
}
