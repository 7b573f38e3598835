// tenon: the registry of error codes, in one place.
//
// Each entry is X(identifier, "stable.code", "what it means"); the identifier
// is the code with '_' for '.' (a test checks it). It becomes
// tenon::codes::identifier (a const char*), and error_registry() lists
// every entry so that tests can walk it (each code needs a test that triggers
// it and a row in the README's bad-input table). Codes are never renamed or
// reused once released; add new ones at the end of their area's list.
#pragma once

#include <cstddef>
#include <string>

#include "tenon/version.hpp"

// core/: shapes, scalar types, random numbers.
#define TENON_ERROR_CODES_CORE(X)                                                                                                                    \
    X(core_shape_mismatch, "core.shape.mismatch", "operand shapes do not fit the operation")                                                         \
    X(core_argument_invalid, "core.argument.invalid", "an argument is outside its documented range")

// autodiff/: the tape and its operations.
#define TENON_ERROR_CODES_AUTODIFF(X)                                                                                                                \
    X(autodiff_backward_not_scalar, "autodiff.backward.not_scalar", "backward() was started from a value that is not 1x1")                           \
    X(autodiff_backward_inference_only, "autodiff.backward.inference_only", "backward() was started on a tape recording for inference only")         \
    X(autodiff_value_foreign, "autodiff.value.foreign", "a value recorded on one tape was used on another, or after the tape was cleared")           \
    X(autodiff_non_finite, "autodiff.non_finite", "with finite checking on, an operation produced a NaN or an infinity")                             \
    X(autodiff_custom_too_many_inputs, "autodiff.custom.too_many_inputs", "a custom operation was given more inputs than a tape node holds")

// prep/: reading tables, encoding, scaling, imputation, splitting, plans.
#define TENON_ERROR_CODES_PREP(X)                                                                                                                    \
    X(prep_file_open, "prep.file.open", "a data file could not be opened or read")                                                                   \
    X(prep_csv_ragged, "prep.csv.ragged", "a CSV row has a different number of fields than the header")                                              \
    X(prep_csv_unterminated_quote, "prep.csv.unterminated_quote", "a quoted CSV field is still open at the end of the input")                        \
    X(prep_csv_stray_quote, "prep.csv.stray_quote", "a quote appears inside an unquoted field or right after a closing quote")                       \
    X(prep_csv_no_header, "prep.csv.no_header", "the CSV input has no header row")                                                                   \
    X(prep_csv_duplicate_column, "prep.csv.duplicate_column", "two header fields have the same name")                                                \
    X(prep_cell_not_numeric, "prep.cell.not_numeric", "a cell of a numeric column is not a finite number")                                           \
    X(prep_cell_not_datetime, "prep.cell.not_datetime", "a cell of a date/time column is not a time stamp in the column's form")                     \
    X(prep_column_unknown, "prep.column.unknown", "no column has the given name")                                                                    \
    X(prep_column_kind, "prep.column.kind", "a step was asked of a column whose kind does not allow it")                                             \
    X(prep_value_missing, "prep.value.missing", "a feature cell is missing and its column has no imputation")                                        \
    X(prep_category_unseen, "prep.category.unseen", "a category (or class) never seen in the training rows, with the policy set to fail")            \
    X(prep_rows_empty, "prep.rows.empty", "a statistic or plan was asked of zero usable rows")                                                       \
    X(prep_rows_out_of_range, "prep.rows.out_of_range", "a row index is not below the table's row count")                                            \
    X(prep_split_fractions, "prep.split.fractions", "split fractions are negative, or do not sum to 1")                                              \
    X(prep_split_empty_subset, "prep.split.empty_subset", "a requested subset or fold would receive no rows")                                        \
    X(prep_split_class_too_small, "prep.split.class_too_small", "a class has fewer rows than folds (or non-empty subsets) in a stratified split")    \
    X(prep_split_single_group, "prep.split.single_group", "a grouped split was asked of fewer groups than subsets or folds")                         \
    X(prep_split_missing_time, "prep.split.missing_time", "a chronological split met a missing time")                                                \
    X(prep_bytes_truncated, "prep.bytes.truncated", "serialized plan bytes end before the data does")                                                \
    X(prep_bytes_bad_tag, "prep.bytes.bad_tag", "serialized plan bytes carry an unknown magic, version, tag or enumeration value")                   \
    X(prep_bytes_oversize, "prep.bytes.oversize", "serialized plan bytes declare a count larger than the bytes could hold")                          \
    X(prep_idx_magic, "prep.idx.magic", "an IDX file has a bad magic number or an unsupported type")                                                 \
    X(prep_idx_truncated, "prep.idx.truncated", "an IDX file holds fewer bytes than its header declares")                                            \
    X(prep_idx_compressed, "prep.idx.compressed", "a gzip-compressed IDX file was given to the plain reader, or failed to decompress")               \
    X(prep_time_ambiguous, "prep.time.ambiguous", "a date column reads both day-first and month-first, and no time format says which")               \
    X(prep_csv_dialect_ambiguous, "prep.csv.dialect_ambiguous",                                                                                      \
      "the delimiter or the decimal mark of a CSV file cannot be told from its first rows")                                                          \
    X(prep_csv_oversize, "prep.csv.oversize", "a CSV field is longer, or a categorical column has more distinct texts, than the reader's limit")     \
    X(prep_value_overflow, "prep.value.overflow", "a value, once scaled by the plan, is beyond the range of the model's number type")

// layers/, losses/, update/: model components.
#define TENON_ERROR_CODES_MODEL(X)                                                                                                                   \
    X(model_layer_option, "model.layer.option", "a layer option is outside its documented range")                                                    \
    X(model_batch_norm_batch_too_small, "model.batch_norm.batch_too_small", "batch normalization in training mode needs at least two rows")          \
    X(model_network_duplicate_name, "model.network.duplicate_name", "two layers of a network share a name")                                          \
    X(model_network_unknown_parameter, "model.network.unknown_parameter", "no parameter has the given name")                                         \
    X(model_network_snapshot_mismatch, "model.network.snapshot_mismatch", "a weight snapshot does not fit the network it is restored into")          \
    X(model_record_truncated, "model.record.truncated", "serialized bytes end before the record")                                                    \
    X(model_record_malformed, "model.record.malformed", "serialized bytes are not a valid record (bad tag, count, nesting or value)")                \
    X(model_record_missing_field, "model.record.missing_field", "an architecture record lacks a field its layer kind needs")                         \
    X(model_record_unknown_kind, "model.record.unknown_kind", "a layer, activation, initializer, update rule or schedule name is not known")         \
    X(model_loss_label_range, "model.loss.label_range", "a class label is not below the number of classes")                                          \
    X(model_loss_weights, "model.loss.weights", "sample or class weights have the wrong count, a negative value or a zero total")                    \
    X(model_loss_target, "model.loss.target", "a target is not a valid probability or distribution")                                                 \
    X(model_loss_option, "model.loss.option", "a loss option is outside its range or not supported")                                                 \
    X(model_update_option, "model.update.option", "an update rule option is outside its range")                                                      \
    X(model_update_state_mismatch, "model.update.state_mismatch", "update rule state does not fit the rule or the parameters it is used with")       \
    X(model_schedule_option, "model.schedule.option", "a learning-rate schedule option is out of range")

// train/: the trainer, metrics, cross-validation.
#define TENON_ERROR_CODES_TRAIN(X)                                                                                                                   \
    X(train_rows_empty, "train.rows.empty", "the training or validation rows are empty")                                                             \
    X(train_option_invalid, "train.option.invalid", "a trainer option or the loss does not fit the data")                                            \
    X(train_input_non_finite, "train.input.non_finite", "a prepared feature or target is NaN or infinite")                                           \
    X(train_team_mismatch, "train.team.mismatch", "the members of a training team disagree on the rows, settings or network they train")             \
    X(train_team_member_failed, "train.team.member_failed", "another member of a training team failed its checks, so every member stops with it")

// deploy.*: model files (format/), the predictor and drift (serve/), retraining (train/).
#define TENON_ERROR_CODES_DEPLOY(X)                                                                                                                  \
    X(deploy_file_io, "deploy.file.io", "a model file could not be opened, read, written, synced or renamed")                                        \
    X(deploy_model_magic, "deploy.model.magic", "the file does not start with the tenon model magic")                                                \
    X(deploy_model_version, "deploy.model.version", "the model file has a format version newer than this build reads")                               \
    X(deploy_model_byte_order, "deploy.model.byte_order", "the model file's byte-order mark is not the one tenon writes")                            \
    X(deploy_model_checksum, "deploy.model.checksum", "a header or section checksum does not match its bytes")                                       \
    X(deploy_model_truncated, "deploy.model.truncated", "the model file ends before its header or a section does")                                   \
    X(deploy_model_oversize, "deploy.model.oversize", "a length or count in the model file exceeds the file size or the loading limits")             \
    X(deploy_model_malformed, "deploy.model.malformed", "a model file section is not valid (bad value, duplicate or trailing bytes)")                \
    X(deploy_model_unknown_required_section, "deploy.model.unknown_required_section",                                                                \
      "the model file has a section marked required that this build does not know")                                                                  \
    X(deploy_model_missing_section, "deploy.model.missing_section",                                                                                  \
      "a section the operation needs (architecture, weights, plan, resume state) is absent")                                                         \
    X(deploy_model_scalar_type, "deploy.model.scalar_type", "the model file stores another scalar type (float or double) than the one asked for")    \
    X(deploy_model_shape_mismatch, "deploy.model.shape_mismatch",                                                                                    \
      "the stored weights do not fit the stored architecture or the plan's feature count")                                                           \
    X(deploy_predictor_unsupported_layer, "deploy.predictor.unsupported_layer", "the network has a layer kind the predictor cannot evaluate")        \
    X(deploy_input_missing_column, "deploy.input.missing_column", "a raw row lacks a column the plan reads")                                         \
    X(deploy_input_missing_value, "deploy.input.missing_value", "a raw cell is missing and the plan has no fill for its column")                     \
    X(deploy_input_not_numeric, "deploy.input.not_numeric", "a raw cell of a numeric or date/time column is not a finite number or date/time")       \
    X(deploy_input_unseen_category, "deploy.input.unseen_category", "a raw category was not seen in training and its column's policy is to fail")    \
    X(deploy_input_non_finite, "deploy.input.non_finite", "an input value is NaN or infinite")                                                       \
    X(deploy_input_shape, "deploy.input.shape", "a call passed more rows than the predictor's capacity or a wrong number of values")                 \
    X(deploy_holder_empty, "deploy.holder.empty", "a predictor holder was read before a predictor was stored")                                       \
    X(deploy_resume_mismatch, "deploy.resume.mismatch", "a saved training state does not fit the network, rows or update rule it is resumed with")   \
    X(deploy_retrain_option, "deploy.retrain.option", "a retraining or promotion option is outside its documented range")                            \
    X(deploy_retrain_too_few_rows, "deploy.retrain.too_few_rows", "too few usable new rows for the promotion holdout's minimum size plus training")  \
    X(deploy_drift_option, "deploy.drift.option", "a drift threshold or option is outside its documented range")                                     \
    X(deploy_drift_empty_window, "deploy.drift.empty_window", "drift was asked of a window without rows")

// distributed/: data-parallel training over MPI, fleet averaging.
#define TENON_ERROR_CODES_DISTRIBUTED(X)                                                                                                             \
    X(distributed_mpi_failed, "distributed.mpi.failed", "an MPI call failed or MPI is not initialized")                                              \
    X(distributed_fleet_bad_bytes, "distributed.fleet.bad_bytes",                                                                                    \
      "a fleet contribution's bytes are not a contribution (magic, version, checksum, length)")                                                      \
    X(distributed_fleet_no_contribution, "distributed.fleet.no_contribution", "fleet averaging was left without an accepted contribution")           \
    X(distributed_plan_mismatch, "distributed.plan.mismatch", "the ranks measuring one plan hold tables with other columns or column kinds")

#define TENON_ERROR_CODES(X)                                                                                                                         \
    TENON_ERROR_CODES_CORE(X)                                                                                                                        \
    TENON_ERROR_CODES_AUTODIFF(X)                                                                                                                    \
    TENON_ERROR_CODES_PREP(X)                                                                                                                        \
    TENON_ERROR_CODES_MODEL(X)                                                                                                                       \
    TENON_ERROR_CODES_TRAIN(X)                                                                                                                       \
    TENON_ERROR_CODES_DEPLOY(X)                                                                                                                      \
    TENON_ERROR_CODES_DISTRIBUTED(X)

TENON_NAMESPACE_BEGIN

namespace codes {
#define TENON_DETAIL_DECLARE_CODE(identifier, code, meaning) inline constexpr const char* identifier = code;
TENON_ERROR_CODES(TENON_DETAIL_DECLARE_CODE)
#undef TENON_DETAIL_DECLARE_CODE

// Each identifier is its code with '_' for '.'. The shorter identifiers of
// earlier releases stay as aliases, so that hosts written against them build.
inline constexpr const char* shape_mismatch = core_shape_mismatch;
inline constexpr const char* invalid_argument = core_argument_invalid;
inline constexpr const char* backward_not_scalar = autodiff_backward_not_scalar;
inline constexpr const char* foreign_value = autodiff_value_foreign;
inline constexpr const char* non_finite = autodiff_non_finite;
inline constexpr const char* too_many_inputs = autodiff_custom_too_many_inputs;
inline constexpr const char* prep_unseen_category = prep_category_unseen;
inline constexpr const char* prep_no_rows = prep_rows_empty;
inline constexpr const char* prep_row_out_of_range = prep_rows_out_of_range;
inline constexpr const char* model_batch_too_small = model_batch_norm_batch_too_small;
inline constexpr const char* model_duplicate_name = model_network_duplicate_name;
inline constexpr const char* model_unknown_parameter = model_network_unknown_parameter;
inline constexpr const char* model_snapshot_mismatch = model_network_snapshot_mismatch;
inline constexpr const char* model_unknown_kind = model_record_unknown_kind;
inline constexpr const char* model_label_range = model_loss_label_range;
inline constexpr const char* train_no_rows = train_rows_empty;
inline constexpr const char* train_option = train_option_invalid;
inline constexpr const char* train_non_finite_input = train_input_non_finite;
inline constexpr const char* deploy_bad_magic = deploy_model_magic;
inline constexpr const char* deploy_newer_version = deploy_model_version;
inline constexpr const char* deploy_byte_order = deploy_model_byte_order;
inline constexpr const char* deploy_checksum = deploy_model_checksum;
inline constexpr const char* deploy_truncated = deploy_model_truncated;
inline constexpr const char* deploy_oversize = deploy_model_oversize;
inline constexpr const char* deploy_malformed = deploy_model_malformed;
inline constexpr const char* deploy_unknown_section = deploy_model_unknown_required_section;
inline constexpr const char* deploy_missing_section = deploy_model_missing_section;
inline constexpr const char* deploy_scalar_type = deploy_model_scalar_type;
inline constexpr const char* deploy_shape_mismatch = deploy_model_shape_mismatch;
inline constexpr const char* deploy_unsupported_layer = deploy_predictor_unsupported_layer;
inline constexpr const char* deploy_missing_column = deploy_input_missing_column;
inline constexpr const char* deploy_missing_value = deploy_input_missing_value;
inline constexpr const char* deploy_not_numeric = deploy_input_not_numeric;
inline constexpr const char* deploy_unseen_category = deploy_input_unseen_category;
inline constexpr const char* deploy_non_finite = deploy_input_non_finite;
inline constexpr const char* distributed_mpi = distributed_mpi_failed;
inline constexpr const char* distributed_fleet_bytes = distributed_fleet_bad_bytes;
inline constexpr const char* distributed_fleet_empty = distributed_fleet_no_contribution;
}  // namespace codes

struct error_code_entry {
    const char* code;
    const char* meaning;
};

namespace detail {
#define TENON_DETAIL_REGISTRY_ENTRY(identifier, code, meaning) error_code_entry{code, meaning},
inline constexpr error_code_entry error_code_table[] = {TENON_ERROR_CODES(TENON_DETAIL_REGISTRY_ENTRY)};
#undef TENON_DETAIL_REGISTRY_ENTRY
}  // namespace detail

/// Every error code tenon can raise, with its meaning.
inline constexpr const error_code_entry* error_registry_begin() noexcept { return detail::error_code_table; }
inline constexpr const error_code_entry* error_registry_end() noexcept {
    return detail::error_code_table + sizeof(detail::error_code_table) / sizeof(detail::error_code_table[0]);
}

/// The registry's own text of `code` (static storage), or null when `code`
/// is not a registered code.
inline const char* registered_code(const std::string& code) noexcept {
    for (const error_code_entry* e = error_registry_begin(); e != error_registry_end(); ++e)
        if (code == e->code) return e->code;
    return nullptr;
}

TENON_NAMESPACE_END
