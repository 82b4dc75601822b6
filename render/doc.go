// Package render writes results in the formats people and programs read:
// explanations as an aligned table with signed bars (coloured on a
// terminal), CSV and .npy; PNG figures in one visual language, ColorBrewer's
// PuOr (orange positive, purple negative): heatmaps for image-shaped
// samples, dot plots for the rest (Cleveland & McGill 1984: a dot per
// feature on one axis, filled when positive and open when negative, so that
// sign survives greyscale), and forest plots for summaries (a point and its
// bootstrap interval per feature, groups as panels on one axis); summaries
// also as a ranked table and CSV; predictions and model descriptions as
// tables. The JSON documents are explain's.
package render
