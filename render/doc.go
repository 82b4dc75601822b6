// Package render writes results in the formats people and programs read:
// explanations as an aligned table with signed bars, CSV and .npy; PNG
// heatmaps and bar charts in one diverging colour map, symmetric around
// zero, red for positive and blue for negative attributions; summaries as
// a ranked table, CSV and a chart with bootstrap intervals; predictions and
// model descriptions as tables. The JSON documents are explain's.
package render
