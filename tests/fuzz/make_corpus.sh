#!/usr/bin/env bash
# make_corpus.sh SLICEWARDEN OUTDIR: the fuzzer's seed corpus, made at test time (nothing large is
# committed): simulator series (classic and Enhanced MR, T1 and double-echo T2, the orientations,
# small matrices so each run stays fast), the same files transcoded by DCMTK into the other transfer
# syntaxes our reader accepts (implicit VR, explicit big endian, deflated, RLE, JPEG lossless,
# JPEG-LS lossless and near-lossless), every file of python3-pydicom's test data, and the DICOM files
# shipped in other installed Debian packages (GDCM and dicom3tools examples). Every seed is named
# by its origin; files that are not regular are skipped. Prints the count per source.
set -euo pipefail
sw=${1:?usage: make_corpus.sh SLICEWARDEN OUTDIR}
out=${2:?usage: make_corpus.sh SLICEWARDEN OUTDIR}
rm -rf "$out"
mkdir -p "$out"
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT

# 1. simulator output
n=0
sim() { # sim NAME OPTIONS...
  local name=$1
  shift
  "$sw" simulate --quiet --matrix 64 --oversample 2 "$@" "$work/$name"
  for f in "$work/$name"/*; do
    case "$f" in *.json) continue ;; esac
    cp "$f" "$out/sim-$name-$(basename "$f")"
    n=$((n + 1))
  done
}
sim t1 --series t1 --slices 3
sim t2 --series t2 --slices 2 --seed 2
sim t1-enh --series t1 --slices 4 --enhanced --orientation feet-first
sim t2-enh --series t2 --slices 3 --enhanced --seed 3
sim t1-trans --series t1 --slices 1 --orientation transposed --rotation 3 --snr 0
sim t1-flip --series t1 --slices 1 --orientation flip-rows --profile rect --tilt-v 2
sim t1-big --series t1 --slices 1 --matrix 128 --fov 250 --snr 30 --shading 0.3
# whole standard series in one input (11 frames), so every step of the analysis is reached
sim t1-enh11 --series t1 --enhanced --seed 4 --matrix 128
sim t1-enh11-tilt --series t1 --enhanced --seed 5 --matrix 128 --tilt-v 2 --thickness 4 \
  --position-offset 2
echo "make_corpus: $n simulator files"

# 2. the same bytes in other transfer syntaxes (DCMTK's converters)
n=0
one_classic=$(ls "$work/t1"/* | grep -v json | head -1)
one_enh=$(ls "$work/t2-enh"/* | grep -v json | head -1)
for src in "$one_classic" "$one_enh"; do
  tag=$(basename "$(dirname "$src")")
  for conv in "dcmconv +ti" "dcmconv +te" "dcmconv +tb" "dcmconv +td" "dcmcrle" \
    "dcmcjpeg +e1" "dcmcjpeg +el" "dcmcjpls +el" "dcmcjpls +en"; do
    name=$(echo "$conv" | tr -c 'A-Za-z0-9\n' '_')
    # shellcheck disable=SC2086
    if $conv "$src" "$out/ts-$tag-$name.dcm" 2>/dev/null; then
      n=$((n + 1))
    fi
  done
  # no preamble and no meta header: a bare data set
  if dcmconv -F +ti "$src" "$out/ts-$tag-bare_dataset.dcm" 2>/dev/null; then n=$((n + 1)); fi
done
echo "make_corpus: $n transcoded files"

# 3. python3-pydicom's test data and the other DICOM files Debian ships
n=0
copy_tree() { # copy_tree PREFIX DIR
  local prefix=$1 dir=$2
  [ -d "$dir" ] || return 0
  while IFS= read -r -d '' f; do
    rel=${f#"$dir"/}
    cp "$f" "$out/$prefix-$(echo "$rel" | tr '/ ' '__')"
    n=$((n + 1))
  done < <(find "$dir" -type f -print0 | sort -z)
}
pyd=$(/usr/bin/python3 -c 'import os, pydicom; print(os.path.dirname(pydicom.__file__))' \
  2>/dev/null)/data
copy_tree pydicom "$pyd/test_files"
copy_tree pydicom-charset "$pyd/charset_files"
copy_tree pydicom-palette "$pyd/palettes"
for f in /usr/share/doc/libgdcm3.0/examples/*.dcm /usr/share/doc/dicom3tools/examples/*.dcm; do
  [ -f "$f" ] || continue
  cp "$f" "$out/debian-$(basename "$(dirname "$(dirname "$f")")")-$(basename "$f")"
  n=$((n + 1))
done
echo "make_corpus: $n files from Debian packages"
echo "make_corpus: $(find "$out" -type f | wc -l) seeds, $(du -sh "$out" | cut -f1) in $out"
