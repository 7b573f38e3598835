// The `tenon` tool's input and output files (output_files.hpp says what
// holds for each kind of path).
#include "output_files.hpp"

#include <cctype>
#include <cerrno>
#include <csignal>
#include <cstdint>
#include <cstdio>
#include <cstring>
#include <filesystem>
#include <memory>
#include <streambuf>
#include <ostream>
#include <sstream>
#include <string>
#include <vector>

#include <dirent.h>
#include <fcntl.h>
#include <signal.h>
#include <sys/stat.h>
#include <unistd.h>

#include <tenon/format/atomic_file.hpp>

namespace tenon_cli {
namespace files {

std::string reason(int e) { return std::strerror(e); }

file_key key_of(const struct stat& st) {
    file_key k;
    k.exists = true;
    k.device = static_cast<std::uint64_t>(st.st_dev);
    k.inode = static_cast<std::uint64_t>(st.st_ino);
    return k;
}

std::string kind_name(mode_t mode) {
    if (S_ISDIR(mode)) return "a directory";
    if (S_ISFIFO(mode)) return "a FIFO (named pipe)";
    if (S_ISCHR(mode)) return "a character device";
    if (S_ISBLK(mode)) return "a block device";
    if (S_ISSOCK(mode)) return "a socket";
    return "not a regular file";
}

/// Checks that `path` (given as `option`) is a readable regular file, before
/// it is opened; returns its identity. Raises `code` with exit status 2.
file_key check_input(const char* code, const std::string& option, const std::string& path) {
    struct stat st {};
    if (::stat(path.c_str(), &st) != 0) {
        const int e = errno;
        throw cli_failure(code, option + " '" + path + "': cannot read it (" + reason(e) + ")", exit_bad_input);
    }
    if (!S_ISREG(st.st_mode))
        throw cli_failure(code, option + " '" + path + "' is " + kind_name(st.st_mode) + ", not a regular file, so it cannot be read as input",
                          exit_bad_input);
    if (::access(path.c_str(), R_OK) != 0) {
        const int e = errno;
        throw cli_failure(code, option + " '" + path + "': cannot read it (" + reason(e) + ")", exit_bad_input);
    }
    return key_of(st);
}

// ---------------------------------------------------------------------------
// Temporary files removed by the signal handler. A fixed table, because the
// handler may only call async-signal-safe functions (unlink, signal, raise;
// POSIX.1-2017 section 2.4.3): no allocation there. Changes are made with
// the three signals blocked, so the handler never sees half a path.

namespace detail {
constexpr int temporary_slots = 32;
constexpr std::size_t temporary_path_bytes = 4096;
struct temporary_table {
    char paths[temporary_slots][temporary_path_bytes];
    volatile std::sig_atomic_t used[temporary_slots];
};
temporary_table& temporaries() {
    static temporary_table table{};
    return table;
}
class signals_blocked {
public:
    signals_blocked() {
        sigset_t s;
        sigemptyset(&s);
        sigaddset(&s, SIGINT);
        sigaddset(&s, SIGTERM);
        sigaddset(&s, SIGHUP);
        ::sigprocmask(SIG_BLOCK, &s, &saved_);
    }
    ~signals_blocked() { ::sigprocmask(SIG_SETMASK, &saved_, nullptr); }
    signals_blocked(const signals_blocked&) = delete;
    signals_blocked& operator=(const signals_blocked&) = delete;

private:
    sigset_t saved_;
};
int register_temporary(const std::string& path) {
    if (path.size() >= temporary_path_bytes) return -1;
    signals_blocked blocked;
    temporary_table& t = temporaries();
    for (int k = 0; k < temporary_slots; ++k)
        if (!t.used[k]) {
            std::memcpy(t.paths[k], path.c_str(), path.size() + 1);
            t.used[k] = 1;
            return k;
        }
    return -1;
}
void unregister_temporary(int slot) {
    if (slot < 0) return;
    signals_blocked blocked;
    temporaries().used[slot] = 0;
}
extern "C" void remove_temporaries_and_end(int signal_number) {
    temporary_table& t = temporaries();
    for (int k = 0; k < temporary_slots; ++k)
        if (t.used[k]) ::unlink(t.paths[k]);
    std::signal(signal_number, SIG_DFL);
    std::raise(signal_number);
}
}  // namespace detail

/// Installs the handler of SIGINT, SIGTERM and SIGHUP (main.cpp calls it):
/// it removes the run's temporary files and ends the process by the same
/// signal, so the caller sees the usual status (a shell shows 128 + N: 130
/// for SIGINT, 143 for SIGTERM, 129 for SIGHUP). No output file is changed.
void remove_temporaries_on_signals() {
    struct sigaction a {};
    a.sa_handler = detail::remove_temporaries_and_end;
    sigfillset(&a.sa_mask);  // one handler at a time
    for (const int s : {SIGINT, SIGTERM, SIGHUP}) {
        struct sigaction old {};
        ::sigaction(s, nullptr, &old);
        if (old.sa_handler == SIG_IGN) continue;  // e.g. started under nohup: stay ignored
        ::sigaction(s, &a, nullptr);
    }
}

// ---------------------------------------------------------------------------
// Stale temporary files

bool process_exists(long pid) {
    if (pid <= 0) return true;  // not a process id: never treated as gone
    return ::kill(static_cast<pid_t>(pid), 0) == 0 || errno == EPERM;
}

/// The process id in `file_name` when it is a temporary file of `name`
/// (".NAME.tenon-PID-HEX.tmp" of this tool and of
/// tenon::write_file_atomically, or "NAME.tmp-PID-N" of earlier versions of
/// the library); else -1.
long temporary_owner(const std::string& file_name, const std::string& name) {
    const auto digits_at = [&](std::size_t p, std::size_t& end) {
        end = p;
        while (end < file_name.size() && file_name[end] >= '0' && file_name[end] <= '9') ++end;
        if (end == p || end - p > 9) return -1L;
        return std::stol(file_name.substr(p, end - p));
    };
    std::size_t end = 0;
    const std::string ours = "." + name + ".tenon-";
    if (file_name.compare(0, ours.size(), ours) == 0) {
        const long pid = digits_at(ours.size(), end);
        if (pid < 0 || end >= file_name.size() || file_name[end] != '-') return -1;
        const std::size_t hex_end = file_name.find(".tmp", end + 1);
        if (hex_end != file_name.size() - 4 || hex_end == end + 1) return -1;
        for (std::size_t k = end + 1; k < hex_end; ++k)
            if (!std::isxdigit(static_cast<unsigned char>(file_name[k]))) return -1;
        return pid;
    }
    const std::string library = name + ".tmp-";
    if (file_name.compare(0, library.size(), library) == 0) {
        const long pid = digits_at(library.size(), end);
        if (pid < 0 || end >= file_name.size() || file_name[end] != '-') return -1;
        std::size_t counter_end = 0;
        if (digits_at(end + 1, counter_end) < 0 || counter_end != file_name.size()) return -1;
        return pid;
    }
    return -1;
}

/// Removes the temporary files of `name` in `directory` left by processes
/// that no longer exist (a SIGKILL, a power loss), when they are regular
/// files of this user. A process id that was reused keeps its files: they
/// are left rather than risk removing a live run's file.
std::size_t remove_stale_temporaries(const std::string& directory, const std::string& name) {
    DIR* d = ::opendir(directory.c_str());
    if (!d) return 0;
    std::size_t removed = 0;
    std::vector<std::string> stale;
    while (const dirent* e = ::readdir(d)) {
        const std::string file_name = e->d_name;
        const long pid = temporary_owner(file_name, name);
        if (pid < 0 || process_exists(pid)) continue;
        stale.push_back(file_name);
    }
    ::closedir(d);
    for (const auto& file_name : stale) {
        const std::string path = directory + "/" + file_name;
        struct stat st {};
        if (::lstat(path.c_str(), &st) != 0 || !S_ISREG(st.st_mode) || st.st_uid != ::geteuid()) continue;
        if (::unlink(path.c_str()) == 0) ++removed;
    }
    return removed;
}

// ---------------------------------------------------------------------------
// Outputs

descriptor_buffer::int_type descriptor_buffer::overflow(int_type c) {
    if (!drain()) return traits_type::eof();
    if (!traits_type::eq_int_type(c, traits_type::eof())) {
        *pptr() = traits_type::to_char_type(c);
        pbump(1);
    }
    return traits_type::not_eof(c);
}

int descriptor_buffer::sync() { return drain() ? 0 : -1; }

bool descriptor_buffer::drain() {
    const char* p = pbase();
    std::size_t left = static_cast<std::size_t>(pptr() - pbase());
    while (left > 0 && failed_ == 0) {
        const ssize_t n = ::write(fd_, p, left);
        if (n < 0) {
            if (errno == EINTR) continue;
            failed_ = errno ? errno : EIO;
            break;
        }
        p += n;
        left -= static_cast<std::size_t>(n);
    }
    setp(buffer_, buffer_ + sizeof(buffer_));
    return failed_ == 0;
}

void output_failure(const std::string& option, const std::string& path, const std::string& what) {
    throw cli_failure(cli_codes::output_write, option + " '" + path + "': " + what, exit_output_failed);
}

output_place resolve_output(const std::string& option, const std::string& path) {
    output_place p;
    p.given = path;
    p.target = path;
    if (path == "-" || path == "/dev/stdout") {
        p.kind = output_kind::standard_output;
        struct stat st {};
        if (::fstat(STDOUT_FILENO, &st) == 0)
            p.key = key_of(st);
        else
            p.key.name = "<standard output>";
        return p;
    }
    struct stat st {};
    const bool descriptor_link = path.rfind("/dev/fd/", 0) == 0 || path.rfind("/proc/", 0) == 0 || path.rfind("/dev/std", 0) == 0;
    if (::stat(path.c_str(), &st) == 0) {
        if (S_ISDIR(st.st_mode)) output_failure(option, path, "is a directory; give a file name");
        if (!S_ISREG(st.st_mode) || descriptor_link) {
            if (S_ISSOCK(st.st_mode)) output_failure(option, path, "is a socket, which cannot be written as a file");
            p.kind = output_kind::direct;
            p.exists = true;
            p.status = st;
            p.key = key_of(st);
            return p;
        }
    } else if (descriptor_link) {
        output_failure(option, path, "cannot be opened (" + reason(errno) + ")");
    }
    // Follow the symlinks of the last component to the file replaced.
    std::string target = path;
    for (int hops = 0;; ++hops) {
        struct stat l {};
        if (::lstat(target.c_str(), &l) != 0) {
            if (errno != ENOENT) output_failure(option, path, "cannot be examined (" + reason(errno) + ")");
            break;
        }
        if (!S_ISLNK(l.st_mode)) {
            p.exists = true;
            break;
        }
        if (hops >= 40) output_failure(option, path, "too many levels of symbolic links");
        std::vector<char> buffer(static_cast<std::size_t>(l.st_size > 0 ? l.st_size : 255) + 2);
        const ssize_t n = ::readlink(target.c_str(), buffer.data(), buffer.size() - 1);
        if (n < 0) output_failure(option, path, "cannot read the symbolic link '" + target + "' (" + reason(errno) + ")");
        const std::string link(buffer.data(), static_cast<std::size_t>(n));
        target = link.empty() || link[0] == '/' ? link : tenon::detail::directory_of(target) + "/" + link;
    }
    p.target = target;
    p.directory = tenon::detail::directory_of(target);
    p.name = tenon::detail::name_of(target);
    if (p.name.empty() || p.name == "." || p.name == "..") output_failure(option, path, "names a directory; give a file name");
    struct stat d {};
    if (::stat(p.directory.c_str(), &d) != 0) {
        const int e = errno;
        output_failure(option, path,
                       e == ENOENT ? "the directory '" + p.directory + "' does not exist"
                                   : "cannot reach the directory '" + p.directory + "' (" + reason(e) + ")");
    }
    if (!S_ISDIR(d.st_mode)) output_failure(option, path, "'" + p.directory + "' is not a directory");
    if (p.exists) {
        if (::stat(target.c_str(), &p.status) != 0) output_failure(option, path, "cannot be examined (" + reason(errno) + ")");
        if (S_ISDIR(p.status.st_mode)) output_failure(option, path, "is a directory; give a file name");
        p.key = key_of(p.status);
    } else {
        p.key.device = static_cast<std::uint64_t>(d.st_dev);
        p.key.inode = static_cast<std::uint64_t>(d.st_ino);
        p.key.name = p.name;
    }
    p.kind = output_kind::staged;
    return p;
}

mode_t current_umask() {
    const mode_t m = ::umask(022);
    ::umask(m);
    return m;
}

pending_output::pending_output(std::string option, const std::string& destination, std::ostream* standard_output)
    : option_(std::move(option)), place_(resolve_output(option_, destination)), standard_output_(standard_output) {
    if (place_.kind == output_kind::staged) create_temporary();
    active_ = true;
}

pending_output& pending_output::operator=(pending_output&& o) noexcept {
    if (this == &o) return *this;
    discard();
    option_ = std::move(o.option_);
    place_ = std::move(o.place_);
    standard_output_ = o.standard_output_;
    temporary_ = std::move(o.temporary_);
    fd_ = o.fd_;
    slot_ = o.slot_;
    mode_ = o.mode_;
    memory_ = std::move(o.memory_);
    active_ = o.active_;
    o.fd_ = -1;
    o.slot_ = -1;
    o.active_ = false;
    stream_.reset();
    if (fd_ >= 0) buffer_.reset(fd_);
    return *this;
}

void pending_output::write(const std::string& content) {
    std::ostream& s = stream();
    s.write(content.data(), static_cast<std::streamsize>(content.size()));
    finish_stream();
}

void pending_output::write(const std::vector<std::uint8_t>& bytes) {
    std::ostream& s = stream();
    s.write(reinterpret_cast<const char*>(bytes.data()), static_cast<std::streamsize>(bytes.size()));
    finish_stream();
}

std::ostream& pending_output::stream() {
    if (!stream_) {
        if (place_.kind == output_kind::staged)
            stream_.reset(new std::ostream(&buffer_));
        else
            stream_.reset(new std::ostream(&memory_));
    }
    return *stream_;
}

void pending_output::finish_stream() {
    if (!stream_) return;
    stream_->flush();
    if (place_.kind == output_kind::staged && (buffer_.error() != 0 || !*stream_))
        output_failure(option_, place_.given,
                       "writing the temporary file '" + temporary_ + "' failed (" + reason(buffer_.error() ? buffer_.error() : EIO) +
                           "); the previous file is unchanged");
}

void pending_output::sync() {
    if (place_.kind != output_kind::staged || fd_ < 0) return;
    finish_stream();
    if (::fchmod(fd_, mode_) != 0) output_failure(option_, place_.given, "cannot set the mode of '" + temporary_ + "' (" + reason(errno) + ")");
    if (place_.exists && ::geteuid() == 0) {
        // root keeps the owner of the file it replaces; a failure leaves root's.
        if (::fchown(fd_, place_.status.st_uid, place_.status.st_gid) != 0) {}
    }
    if (::fsync(fd_) != 0)
        output_failure(option_, place_.given, "fsync of '" + temporary_ + "' failed (" + reason(errno) + "); the previous file is unchanged");
}

void pending_output::commit() {
    if (!active_) return;
    switch (place_.kind) {
    case output_kind::standard_output:
        if (standard_output_) {
            const std::string text = memory_.str();
            standard_output_->write(text.data(), static_cast<std::streamsize>(text.size()));
            standard_output_->flush();
        }
        break;
    case output_kind::direct: write_directly(); break;
    case output_kind::staged: {
        sync();
        const int fd = fd_;
        fd_ = -1;
        if (::close(fd) != 0) output_failure(option_, place_.given, "closing '" + temporary_ + "' failed (" + reason(errno) + ")");
        if (::rename(temporary_.c_str(), place_.target.c_str()) != 0)
            output_failure(option_, place_.given, "cannot move '" + temporary_ + "' into place (" + reason(errno) + ")");
        detail::unregister_temporary(slot_);
        slot_ = -1;
        const int dir = ::open(place_.directory.c_str(), O_RDONLY | O_CLOEXEC);
        if (dir >= 0) {
            ::fsync(dir);
            ::close(dir);
        }
        break;
    }
    case output_kind::none: break;
    }
    active_ = false;
}

void pending_output::discard() noexcept {
    if (!active_) return;
    stream_.reset();
    if (fd_ >= 0) ::close(fd_);
    fd_ = -1;
    if (!temporary_.empty()) ::unlink(temporary_.c_str());
    detail::unregister_temporary(slot_);
    slot_ = -1;
    active_ = false;
}

void pending_output::create_temporary() {
    if (place_.exists) {
        // In a sticky directory (as /tmp) only the file's owner, the
        // directory's owner or root may replace a file (POSIX rename(),
        // EPERM): found now, before training, not at the final rename.
        struct stat d {};
        const uid_t me = ::geteuid();
        if (::stat(place_.directory.c_str(), &d) == 0 && (d.st_mode & S_ISVTX) && me != 0 && me != d.st_uid && me != place_.status.st_uid)
            output_failure(option_, place_.given,
                           "cannot be replaced: it belongs to another user and its directory '" + place_.directory +
                               "' is sticky (Operation not permitted)");
    }
    remove_stale_temporaries(place_.directory, place_.name);
    mode_ = place_.exists ? static_cast<mode_t>(place_.status.st_mode & 07777) : static_cast<mode_t>(0666 & ~current_umask());
    // The library's safe temporary file (tenon/deploy/atomic_file.hpp):
    // ".NAME.tenon-PID-RANDOM.tmp", O_CREAT|O_EXCL|O_NOFOLLOW, mode 0600.
    tenon::native_file_system host;
    // Signals wait until the file is in the handler's table: one arriving
    // between its creation and its registration would leave it behind.
    detail::signals_blocked blocked;
    const int fd = tenon::create_temporary_file(place_.directory + "/" + place_.name, host, temporary_);
    if (fd < 0) {
        const int e = errno;
        output_failure(option_, place_.given,
                       e == EEXIST ? "cannot create a temporary file in '" + place_.directory + "' (every name tried exists)"
                                   : "cannot create a file in the directory '" + place_.directory + "' (" + reason(e) + ")");
    }
    fd_ = fd;
    slot_ = detail::register_temporary(temporary_);
    buffer_.reset(fd_);
}

void pending_output::write_directly() {
    // O_NONBLOCK: a FIFO without a reader fails with ENXIO instead of
    // waiting forever; blocking writes are restored after the open.
    const int fd = ::open(place_.target.c_str(), O_WRONLY | O_NOCTTY | O_CLOEXEC | O_NONBLOCK | (S_ISREG(place_.status.st_mode) ? O_APPEND : 0));
    if (fd < 0) {
        const int e = errno;
        output_failure(option_, place_.given, e == ENXIO ? "is a FIFO with no reader" : "cannot be opened for writing (" + reason(e) + ")");
    }
    const int flags = ::fcntl(fd, F_GETFL);
    if (flags >= 0) ::fcntl(fd, F_SETFL, flags & ~O_NONBLOCK);
    descriptor_buffer b(fd);
    std::ostream s(&b);
    s << memory_.str();
    s.flush();
    const int e = b.error();
    ::close(fd);
    if (e != 0 || !s) output_failure(option_, place_.given, "writing failed (" + reason(e ? e : EIO) + ")");
}

void file_roster::check(const std::string& allowed_a, const std::string& allowed_b) const {
    for (std::size_t a = 0; a < entries_.size(); ++a)
        for (std::size_t b = a + 1; b < entries_.size(); ++b) {
            const entry& x = entries_[a];
            const entry& y = entries_[b];
            if (!x.is_output && !y.is_output) continue;
            if (!x.key.same_as(y.key)) continue;
            if (!allowed_a.empty() && ((x.option == allowed_a && y.option == allowed_b) || (x.option == allowed_b && y.option == allowed_a)))
                continue;
            const std::string same = x.path == y.path ? "'" + x.path + "'" : "'" + x.path + "' and '" + y.path + "' (the same file)";
            throw cli_failure(cli_codes::option_conflict, x.option + " and " + y.option + " name the same file: " + same, exit_bad_input);
        }
}

/// Commits the outputs in order. Every one was written and synced first, so
/// a failure here is a failing rename (a file system error). Outputs already
/// moved stay in place, complete; the message names them. Nothing the run did
/// not create is removed.
void commit_all(std::vector<pending_output*> outputs) {
    for (auto* o : outputs)
        if (o->active()) o->sync();
    std::vector<std::string> placed;
    for (auto* o : outputs) {
        if (!o->active()) continue;
        try {
            o->commit();
        } catch (const cli_failure& e) {
            std::string message = e.message();
            if (!placed.empty()) {
                message += "; already written: ";
                for (std::size_t k = 0; k < placed.size(); ++k) message += (k ? ", '" : "'") + placed[k] + "'";
            }
            throw cli_failure(e.code(), message, e.exit_status());
        }
        placed.push_back(o->destination());
    }
}

// Two paths name the same file when they reach the same device and inode
// (symlinks followed; hard links included); a file that does not exist yet is
// named by its directory's device and inode and its name (file_key).
file_key file_identity(const std::string& path) {
    if (path == "-") return resolve_output("", path).key;
    struct stat st {};
    if (::stat(path.c_str(), &st) == 0) return key_of(st);
    file_key k;
    struct stat d {};
    if (::stat(tenon::detail::directory_of(path).c_str(), &d) == 0) {
        k.device = static_cast<std::uint64_t>(d.st_dev);
        k.inode = static_cast<std::uint64_t>(d.st_ino);
        k.name = tenon::detail::name_of(path);
    } else {
        k.name = std::filesystem::path(path).lexically_normal().string();
    }
    return k;
}

bool same_file(const std::string& a, const std::string& b) { return file_identity(a).same_as(file_identity(b)); }

}  // namespace files
}  // namespace tenon_cli
