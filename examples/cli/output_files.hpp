// The `tenon` tool's input and output files: what it checks before it reads
// or writes, and how it writes so that a failure never loses a file.
//
// Only regular files are read as inputs. Each output is resolved before
// anything is read or trained: standard output, a non-regular file (written
// directly, never replaced) or a staged file (a temporary file beside the
// destination, fsynced and renamed over it; a symlink is followed). Files are
// compared by identity (device and inode), never by path text. Temporary
// files are removed on SIGINT, SIGTERM and SIGHUP, and by the next run after
// a SIGKILL. In detail: docs/design/tool.md.
#pragma once

#include <cstdint>
#include <memory>
#include <ostream>
#include <sstream>
#include <streambuf>
#include <utility>
#include <string>
#include <vector>

#include <sys/stat.h>
#include <sys/types.h>

#include "tool.hpp"

namespace tenon_cli {
namespace files {

/// Where a file is: device and inode when it exists; else the directory's
/// device and inode and the name.
struct file_key {
    bool exists = false;
    std::uint64_t device = 0, inode = 0;
    std::string name;
    bool same_as(const file_key& o) const { return exists == o.exists && device == o.device && inode == o.inode && name == o.name; }
};

/// strerror(e).
std::string reason(int e);
/// The identity of a file stat() or fstat() described.
file_key key_of(const struct stat& st);
/// Checks that `path` (given as `option`) is a readable regular file, before
/// it is opened; returns its identity. Raises `code` with exit status 2.
file_key check_input(const char* code, const std::string& option, const std::string& path);
/// Removes the temporary files of `name` in `directory` left by processes
/// that no longer exist (a SIGKILL, a power loss), when they are regular
/// files of this user. A process id that was reused keeps its files: they
/// are left rather than risk removing a live run's file.
std::size_t remove_stale_temporaries(const std::string& directory, const std::string& name);

// ---------------------------------------------------------------------------
// Outputs

/// A stream buffer writing to a file descriptor (the temporary file),
/// remembering the first failure.
class descriptor_buffer : public std::streambuf {
public:
    explicit descriptor_buffer(int fd = -1) : fd_(fd) { setp(buffer_, buffer_ + sizeof(buffer_)); }
    void reset(int fd) {
        fd_ = fd;
        failed_ = 0;
        setp(buffer_, buffer_ + sizeof(buffer_));
    }
    int error() const noexcept { return failed_; }

protected:
    int_type overflow(int_type c) override;
    int sync() override;

private:
    bool drain();
    int fd_;
    int failed_ = 0;
    char buffer_[1 << 16];
};

enum class output_kind { none, staged, direct, standard_output };

/// Where an output goes, resolved before anything is trained.
struct output_place {
    output_kind kind = output_kind::none;
    std::string given;  // as the user wrote it
    std::string target;  // the file replaced (symlinks followed) or written
    std::string directory;  // of target (staged)
    std::string name;  // of target (staged)
    bool exists = false;
    struct stat status {};
    file_key key;
};

/// Where `path`, given as `option`, is written (output_failure when it cannot be).
output_place resolve_output(const std::string& option, const std::string& path);
[[noreturn]] void output_failure(const std::string& option, const std::string& path, const std::string& what);

/// Two paths name the same file when they reach the same device and inode
/// (symlinks followed; hard links included); a file that does not exist yet is
/// named by its directory's device and inode and its name (file_key).
file_key file_identity(const std::string& path);
bool same_file(const std::string& a, const std::string& b);

/// One output file of a run: claimed (resolved, and its temporary file
/// created) before training; written; then committed (moved into place) or,
/// when the run fails, discarded: only the temporary file is removed, never
/// a file the run did not create.
class pending_output {
public:
    pending_output() = default;
    /// `standard_output` receives the contents for "-" and /dev/stdout.
    pending_output(std::string option, const std::string& destination, std::ostream* standard_output = nullptr);
    pending_output(const pending_output&) = delete;
    pending_output& operator=(const pending_output&) = delete;
    pending_output(pending_output&& o) noexcept { *this = std::move(o); }
    pending_output& operator=(pending_output&& o) noexcept;
    ~pending_output() { discard(); }

    bool active() const noexcept { return active_; }
    const std::string& destination() const noexcept { return place_.given; }
    const output_place& place() const noexcept { return place_; }
    bool to_standard_output() const noexcept { return active_ && place_.kind == output_kind::standard_output; }

    void write(const std::string& content);
    void write(const std::vector<std::uint8_t>& bytes);
    /// The contents as a stream, for output written piece by piece; end with
    /// finish_stream(), then commit().
    std::ostream& stream();
    void finish_stream();
    /// Makes the contents durable in the temporary file (staged outputs):
    /// every output of a run is synced before the first is moved into place.
    void sync();
    void commit();
    /// Forgets the output: removes its temporary file (never the destination).
    void discard() noexcept;

private:
    void create_temporary();
    void write_directly();

    std::string option_;
    output_place place_;
    std::ostream* standard_output_ = nullptr;
    std::string temporary_;
    int fd_ = -1;
    int slot_ = -1;
    mode_t mode_ = 0644;
    descriptor_buffer buffer_;
    std::stringbuf memory_;
    std::unique_ptr<std::ostream> stream_;
    bool active_ = false;
};

/// The files of one run, for the identity checks: inputs and outputs.
class file_roster {
public:
    void input(const std::string& option, const std::string& path, const file_key& key) { entries_.push_back({option, path, key, false}); }
    void output(const std::string& option, const pending_output& o) {
        if (o.active()) entries_.push_back({option, o.destination(), o.place().key, true});
    }
    /// Fails when an output is the same file as an input or another output
    /// (except the pair of options `allowed`, e.g. an in-place retrain).
    void check(const std::string& allowed_a = {}, const std::string& allowed_b = {}) const;

private:
    struct entry {
        std::string option, path;
        file_key key;
        bool is_output;
    };
    std::vector<entry> entries_;
};

/// Commits the outputs in order. Every one was written and synced first, so
/// a failure here is a failing rename (a file system error). Outputs already
/// moved stay in place, complete; the message names them. Nothing the run did
/// not create is removed.
void commit_all(std::vector<pending_output*> outputs);

}  // namespace files
}  // namespace tenon_cli
